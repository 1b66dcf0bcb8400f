"""movieproc: pump-probe X-ray solution scattering, from single shots to a molecular movie."""

__version__ = "0.1.0"
