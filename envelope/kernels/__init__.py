"""Pure NumPy/SciPy kernels: no I/O, no xarray."""
