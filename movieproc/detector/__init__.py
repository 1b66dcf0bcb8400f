"""detector"""
