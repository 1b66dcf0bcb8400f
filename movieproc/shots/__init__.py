"""shots"""
