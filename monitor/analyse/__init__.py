"""Analysis: windows, spectra, band values, speed, peaks, envelope and time-domain statistics."""
