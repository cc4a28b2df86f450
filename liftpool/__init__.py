"""liftpool: bias-corrected, partially pooled lift of display campaigns.

This top-level module stays light: importing ``liftpool.data_prep`` imports
it first, so it must not import the layers above.
"""

__version__ = "0.1.0"
__all__ = ["__version__"]
