"""Analysis of curves and spectra produced by the engines."""
