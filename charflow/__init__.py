"""charflow: NLDM timing tables in Liberty format from transistor netlists and SPICE models."""

__version__ = "0.1.0"
