"""A micrograph that kills the worker process it is sent to (for the worker-death test)."""
import multiprocessing
import os
from dataclasses import dataclass

from edges import Micrograph


@dataclass(frozen=True)
class WorkerKiller(Micrograph):
    """Unpickled in a child process (a worker receiving it), it ends that process at once, as an
    out-of-memory kill would; in the main process it is an ordinary micrograph."""

    def __setstate__(self, state):
        if multiprocessing.parent_process() is not None:
            os._exit(9)
        self.__dict__.update(state)
