"""Units of work on a Dask distributed cluster (optional extra ``cluster``).

:func:`connect` opens a :class:`distributed.Client` on a running scheduler; the returned
:class:`DaskExecutor` runs :func:`~calib.compute.executor.ordered_map` over the client's
``concurrent.futures`` executor (:class:`~calib.compute.executor.PoolExecutor`), the code path
local processes take. What travels: the
function by reference (module and name: every worker has calib installed) and each unit's
plain data (pickled arrays and settings), then the results back to the caller. Workers never
see a database URL. A worker lost mid-unit is the scheduler's to handle: it runs the unit
again elsewhere, and the caller, which alone writes, still receives each result once.
"""

from __future__ import annotations

from concurrent.futures import Executor as FuturesExecutor
from typing import TYPE_CHECKING

from calib.compute.executor import PoolExecutor
from calib.errors import ClusterError

if TYPE_CHECKING:
    from distributed import Client

CONNECT_SECONDS = 5.0
"""How long :func:`connect` waits for the scheduler to answer."""

INSTALL_HINT = "needs dask distributed (pip install 'calib[cluster]')"


class DaskExecutor(PoolExecutor):
    """The units on the cluster behind ``client``; ``close()`` disconnects (the cluster
    keeps running)."""

    def __init__(self, client: Client, address: str) -> None:
        self.client = client
        self.address = address

    @property
    def workers(self) -> int:
        """Worker threads the cluster has now (at least 1: workers may join later)."""
        threads: dict[str, int] = self.client.nthreads()
        return max(1, sum(threads.values()))

    @property
    def where(self) -> str:
        return f"cluster {self.address}"

    def pool(self) -> FuturesExecutor:
        # pure=False: every unit is its own task, never merged with an equal-looking one
        executor: FuturesExecutor = self.client.get_executor(pure=False)
        return executor

    def close(self) -> None:
        self.client.close()


def connect(address: str, timeout: float = CONNECT_SECONDS) -> DaskExecutor:
    """A client of the scheduler at ``address`` (``tcp://host:8786``).

    Raises
    ------
    ClusterError
        dask distributed is not installed, the address is malformed, or nothing answers
        there within ``timeout`` seconds.
    """
    try:
        from distributed import Client
    except ImportError:
        raise ClusterError(address, INSTALL_HINT) from None
    try:
        client = Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ClusterError(address, f"no answer ({detail})") from None
    return DaskExecutor(client, address)
