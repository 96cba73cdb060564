"""Where units of work run: this process, local worker processes, or a Dask cluster.

Below every other layer: it imports nothing of calib but its errors. See
:mod:`calib.compute.executor` (the interface, local backends) and :mod:`calib.compute.cluster`
(Dask distributed, optional extra ``cluster``).
"""

from calib.compute.executor import (
    Executor,
    InlineExecutor,
    ProcessExecutor,
    local_executor,
    open_executor,
)

__all__ = ["Executor", "InlineExecutor", "ProcessExecutor", "local_executor", "open_executor"]
