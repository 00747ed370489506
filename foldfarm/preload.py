"""Imported once by the local cluster's fork server: Dask and the compiled kernel, loaded.

The local cluster (:func:`foldfarm.run.connect`) starts its worker
processes with multiprocessing's *forkserver* method where the platform
has it.  The fork server is a single-threaded process that imports this
module once; every worker is then forked from it with Dask imported and
the kernel loaded (about 1 CPU-second a worker otherwise, or a full
compile each on a machine whose numba cache is still empty, every worker
compiling the same code at once).

The workers also ignore SIGINT (see below).

Importing this module has that side effect on purpose, and nothing else
imports it.  It never raises: a fork server whose preload failed would
take every worker start down with it, and each worker loads the kernel
itself anyway (:class:`foldfarm.worker.ReadyWorker`).
"""

import gc
import signal

# A terminal's Ctrl-C reaches its whole foreground process group, local workers included; the
# coordinator alone stops the run (it cancels, records and prints how to resume), so workers forked
# from here ignore SIGINT (the fork server restores, in each child, the handlers it found after its
# preload).  Without this each worker died with a KeyboardInterrupt traceback on the terminal.
signal.signal(signal.SIGINT, signal.SIG_IGN)

class _HeartbeatToAClosedScheduler:
    """Drops a worker's "failed to communicate with scheduler during heartbeat" traceback.

    The coordinator closes its local cluster when a run ends or stops; a
    heartbeat already on its way then meets a closed scheduler, and Dask
    logged that as an error with a traceback on the terminal the run was
    stopped from.  A scheduler lost mid-run is the coordinator's to report
    (:mod:`foldfarm.reconnect`), in one line.
    """

    def filter(self, record) -> bool:
        return not record.getMessage().startswith("Failed to communicate with scheduler during heartbeat")


try:
    import logging

    import distributed  # noqa: F401  (what the worker processes run)

    logging.getLogger("distributed.worker").addFilter(_HeartbeatToAClosedScheduler())

    from foldfarm.worker import warm_worker

    warm_worker()
except Exception:  # noqa: BLE001 - see the module docstring
    pass

# Everything loaded so far lives as long as the server and its workers.  Frozen, the
# collectors of the forked workers never walk it (nor write to its pages, which stay
# shared), and the server itself exits at once when its parent does, instead of
# holding the parent's stdout and stderr for the 0.5 s its final collections took.
gc.freeze()
