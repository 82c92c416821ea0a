"""faiss set up the way every search and clustering here wants it (imported inside the functions,
so importing the modules that use it stays cheap)."""
from __future__ import annotations

import contextlib


@contextlib.contextmanager
def one_thread():
    """faiss on one thread: for a few dozen points, waking OpenMP threads costs far more than the work."""
    import faiss

    n = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)
    try:
        yield
    finally:
        faiss.omp_set_num_threads(n)
