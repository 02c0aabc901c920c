"""Pure statistical core: numpy/scipy over arrays, no I/O, vectorized over many lines."""
