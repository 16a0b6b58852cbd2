"""Loss-reduction planning for power networks."""
__version__ = "0.1.0"
