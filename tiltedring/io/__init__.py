"""Reading maps into :class:`.maps.VelocityMap`, binning, and atomic writing of outputs."""
