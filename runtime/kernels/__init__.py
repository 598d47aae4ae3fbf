"""The compiled fast path: numba kernels of the law tick, the dry-run loop and the sweep,
held to the numpy reference of `runtime.method` by tests (tests/test_fast.py).
"""
