"""ldptransform: release row-level extracts under local differential privacy."""

__version__ = "0.1.0"
