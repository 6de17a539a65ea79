//! HDF5 recording (being built: see issue 4).
