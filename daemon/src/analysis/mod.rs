//! Run analysis: spectra, Allan deviation, model fits and tuning rules (being built: see issue 7).
