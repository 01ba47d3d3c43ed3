"""C sources of the optional compiled kernels (built by setup.py as ecl_quant._native_*)."""
