"""cellbuild: cubic crystal structures for atomistic simulation, from YAML recipes."""
__version__ = "0.1.0"
