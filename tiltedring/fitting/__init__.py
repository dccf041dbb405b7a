"""Ring fitting: named ring parameters, projection and line-of-sight kernels, the compiled ring
solver, pixel selection, the first guess, the fit response, beam smearing and resampling.
Numerics only: nothing here reads or writes files."""
