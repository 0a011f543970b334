"""Every compiled kernel and every numba option, nothing else.

``config`` holds the options and the deferred-compilation machinery;
``kernels`` the store's, the codes' and the near-duplicate kernels: arrays
in, arrays out, no validation (the public wrappers validate).
"""
