"""``--scheduler ADDRESS``: a Dask cluster for ``roikit extract``, ``roikit stats`` and ``roikit run``.

Dask (the optional ``distributed`` extra) is imported only when the option is given, so ``roikit --help`` and every
command without it start without it.
"""

from __future__ import annotations

import contextlib

from .._options import option
from ..errors import ClusterError, UsageError

#: How long to try reaching the scheduler before giving up.
CONNECT_TIMEOUT = "10s"


def add_scheduler_option(parser, *, does: str) -> None:
    """Add ``--scheduler ADDRESS`` (help from the one table of options; ``does`` says what runs on the cluster)."""
    o = option("scheduler")
    parser.add_argument(o.cli, metavar=o.metavar, default=None, help=f"{does}: {o.help}")


@contextlib.contextmanager
def dask_client(address: str | None):
    """A ``distributed.Client`` connected to ``address`` (``None``: no cluster, yields ``None``), closed after use.

    Raises :class:`UsageError` when Dask is not installed or the address is malformed, :class:`ClusterError` when no
    scheduler answers there.
    """
    if not address:
        yield None
        return
    try:
        from distributed import Client
    except ImportError as exc:
        raise UsageError("--scheduler needs Dask, which is not installed: pip install 'roikit[distributed]'") from exc
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT)
    except ValueError as exc:
        raise UsageError(f"--scheduler {address}: not a scheduler address ({exc}); expected e.g. "
                         "tcp://10.0.0.5:8786") from exc
    except (OSError, TimeoutError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ClusterError(f"--scheduler {address}: cannot reach a Dask scheduler there ({reason}); check the "
                           "address and that the scheduler is running") from exc
    with client:
        yield client
