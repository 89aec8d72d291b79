"""potfield: potential-field survey processing from raw readings to checked deliverables."""

__version__ = "0.1.0"
