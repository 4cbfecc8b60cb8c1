"""Process-wide memory settings for large one-shot commands (``make``, ``inspect``).

Kept apart from the pipeline so that ``inspect`` can apply them without
importing the build side. No heavy imports at module load.
"""
from __future__ import annotations

#: Bytes of input file from which `cellbuild inspect` applies
#: :func:`reuse_freed_memory` (about 200,000 atoms of LAMMPS data).
REUSE_MEMORY_FILE_BYTES = 10 * 2**20


#: Atoms from which `cellbuild make` asks the allocator to keep freed memory
#: (:func:`reuse_freed_memory`); smaller builds never allocate large arrays.
REUSE_MEMORY_ATOMS = 500_000


def reuse_freed_memory() -> None:
    """Let this process reuse the memory it frees instead of returning it to the
    kernel and faulting fresh pages in again (glibc only; elsewhere a no-op).

    A build allocates and frees arrays of hundreds of MB one after another;
    glibc serves each from a fresh mmap (its limit for reuse is 32 MB) and
    numpy asks for transparent huge pages on each, so every array's pages
    were faulted in (zeroed by the kernel) anew: at 10M atoms 4.3 s of system
    time for 5.9 s of user time. With mmap off, heap trimming off and
    numpy's huge-page advice off, freed arrays come back from the heap: 1.0 s
    of system time, the peak resident memory about 25 % higher (fragments of
    the heap are reused less tightly), and memory freed by a large build stays
    with the process until it exits. Process-wide settings, so the library
    never applies them on its own: the `make` command (a process that ends
    after the build) does, from :data:`REUSE_MEMORY_ATOMS` atoms, and so does
    `inspect` for large files; a Python
    program may call this itself. Idempotent.
    """
    import ctypes

    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return  # not glibc: nothing to tune
    m_trim_threshold, m_mmap_max = -1, -4  # glibc's malloc.h
    mallopt(m_mmap_max, 0)
    mallopt(m_trim_threshold, -1)  # -1: never trim (mallopt(3))
    import numpy as np

    multiarray = getattr(getattr(np, "_core", None), "multiarray", None)  # numpy >= 2
    set_hugepage = getattr(multiarray, "_set_madvise_hugepage", None)
    if set_hugepage is not None:
        set_hugepage(False)
