"""BLAS/OpenMP thread limits for small-matrix work.

The matrices here are tiny; multi-threaded BLAS only adds spin-waiting, which on a busy
2-core machine made one ML fit about 5 times slower (measured: 2.8 s against 0.54 s for
the same fit). Every compute entry point runs inside :func:`single_thread`.
"""

from contextlib import contextmanager

#: Environment variables that cap BLAS/OpenMP threads in processes started later.
THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
               "VECLIB_MAXIMUM_THREADS", "NUMEXPR_NUM_THREADS")


_CONTROLLER = []


@contextmanager
def single_thread():
    """Limit BLAS and OpenMP pools to one thread for the duration of the block.

    The libraries are looked up once per process (a look-up reads the process's memory
    maps and took 4 ms, as long as a whole small ML fit's arithmetic).
    """
    from threadpoolctl import ThreadpoolController

    if not _CONTROLLER:
        _CONTROLLER.append(ThreadpoolController())
    with _CONTROLLER[0].limit(limits=1):
        yield
