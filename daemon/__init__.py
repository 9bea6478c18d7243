"""straind: unattended acquisition service for strain-gauge bridges."""

__version__ = "0.1.0"

#: Version of the HDF5 layout written by straind.store (see README, "HDF5 layout").
FORMAT_VERSION = 1
