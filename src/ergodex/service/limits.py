"""Resource limits of the service: memory ceilings, archive sizes, and the cost of a check.

Three guards share this module, all cheap and free of the web framework:

- :func:`apply_memory_limit` caps a process's address space (``RLIMIT_AS``), so a job or an
  upload reader that asks for more gets a ``MemoryError`` instead of taking the machine down;
  :func:`is_memory_error` recognises that error however a library re-raised it.
- :func:`declared_inflated_size` reads what a zip archive (an NPZ file) says its members hold
  once inflated, from the central directory alone, so that a compression bomb is refused
  before a single byte of it is inflated.
- :func:`check_memory_estimate` estimates what a statistical check will hold in memory, so that
  a request that cannot fit under the job memory limit is refused when it is submitted rather
  than failing after minutes in a worker.
"""

from __future__ import annotations

import errno
import math
import zipfile
from pathlib import Path
from typing import Any

#: Peak memory of one check in units of the stored ensemble (members × outputs × variables
#: float64): the integrator's trajectories, their copy in data space, and the working arrays of
#: the statistics. Measured on the convection loop (Lorenz-63, 3 variables, dt 0.01): the peak
#: grew by 12.5-13 times the stored ensemble for 16-32 members and 500-1000 time units; 16
#: leaves some headroom.
CHECK_MEMORY_FACTOR = 16

#: Bytes of one float64.
FLOAT_BYTES = 8


def apply_memory_limit(nbytes: int | None) -> bool:
    """Set this process's soft address-space limit to ``nbytes`` (``None``: no limit).

    Returns ``False`` where the platform has no ``RLIMIT_AS`` (the limit is then not enforced).
    The soft limit can be raised again later up to the hard limit, which is left untouched, so a
    worker can lift its limit between jobs.
    """
    try:
        import resource
    except ImportError:  # pragma: no cover - not POSIX
        return False
    if not hasattr(resource, "RLIMIT_AS"):  # pragma: no cover - e.g. some BSDs
        return False
    _soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    if nbytes is None:
        soft = hard
    else:
        soft = int(nbytes) if hard == resource.RLIM_INFINITY else min(int(nbytes), hard)
    resource.setrlimit(resource.RLIMIT_AS, (soft, hard))
    return True


def is_memory_error(exc: BaseException | None) -> bool:
    """True when ``exc`` is a ``MemoryError`` (or an ``OSError`` ENOMEM, as from ``mmap`` or a
    thread start under the limit), or was raised while handling / because of one."""
    seen = 0
    while exc is not None and seen < 20:
        if isinstance(exc, MemoryError):
            return True
        if isinstance(exc, OSError) and exc.errno == errno.ENOMEM:
            return True
        exc = exc.__cause__ or exc.__context__
        seen += 1
    return False


def declared_inflated_size(path: str | Path) -> int:
    """Sum of the uncompressed sizes a zip archive declares for its members.

    Only the central directory is read. Python's zip reader never inflates a member beyond its
    declared size (it stops there and checks the CRC), so this sum bounds what reading the
    archive can inflate, whatever the compressed bytes say.

    Raises
    ------
    zipfile.BadZipFile
        When the file is not a readable zip archive.
    """
    with zipfile.ZipFile(path) as archive:
        return sum(max(0, info.file_size) for info in archive.infolist())


def check_memory_estimate(
    options: dict[str, Any] | None, *, dt: float, variables: int, samples: int
) -> int:
    """Bytes a check with these options is expected to hold at its peak.

    The ensemble a check integrates is stored whole: ``members × n_out × variables`` floats,
    with ``n_out = length / dt`` (see :func:`ergodex.integrate.integrate_ensemble`, whose
    docstring states that memory); :data:`CHECK_MEMORY_FACTOR` covers the copies made after.
    Without a ``length``, a member covers half the reference pieces (``CheckSpec.pool``), so at
    most half the reference data's samples, used here as the bound.

    Parameters
    ----------
    options
        The request's check options (``members``, ``length``; unset ones take the defaults).
    dt, variables, samples
        Sampling interval, number of variables and total samples of the reference dataset.
    """
    from ergodex.validation import CheckSpec

    options = options or {}
    members = int(options.get("members") or CheckSpec.members)
    length = options.get("length")
    n_out = math.ceil(float(length) / dt) if length else math.ceil(int(samples) / 2)
    return members * max(1, n_out) * max(1, int(variables)) * FLOAT_BYTES * CHECK_MEMORY_FACTOR
