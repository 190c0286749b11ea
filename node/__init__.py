"""cest-node: the DICOM service beside the scanner. Research use only, not a medical device."""

__version__ = "0.1.0"
