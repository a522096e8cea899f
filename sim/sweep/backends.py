"""Where sweep points run: in this process, a local process pool, or Dask.

Every backend runs :func:`sim.sweep.worker.run_point` on the same plain
inputs and offers the same three calls:

* ``submit(task)`` -- start one task (``task.args`` are run_point's arguments);
* ``wait()`` -- block until at least one task ends; returns ``[(task, outcome)]``
  where an outcome is ``("ok", doc, build)``, ``("error", line, build)`` or
  ``("lost", line, None)`` when the process running it died;
* ``close()``.

``slots`` says how many tasks are worth keeping in flight. ``prepare(traces)``,
called before the first ``submit``, readies every worker for its first point
(:func:`sim.sweep.worker.prepare`: DRAM kernels loaded, traces read), so no
point pays for them.
"""

import concurrent.futures as cf
import multiprocessing as mp
import os

from .spec import SweepError
from .worker import prepare, run_point

CONNECT_TIMEOUT_S = 3


class SerialBackend:
    """Runs each task in this process when asked to wait (``--jobs 1``)."""

    name = "serial"
    slots = 1

    def __init__(self):
        self._queue = []

    def prepare(self, traces):
        prepare(traces)

    def submit(self, task):
        self._queue.append(task)

    def wait(self):
        task = self._queue.pop(0)
        return [(task, run_point(*task.args))]

    def pending(self):
        return len(self._queue)

    def close(self):
        self._queue.clear()


class PoolBackend:
    """A local :class:`concurrent.futures.ProcessPoolExecutor` over ``jobs`` processes.

    When a worker process dies the pool breaks: every task then in flight is
    reported ``lost`` and a fresh pool takes the next submissions.

    Where processes start by ``fork``, :meth:`prepare` readies this process
    before the pool starts, and every worker inherits the loaded kernels and
    traces (no worker loads anything); otherwise each worker readies itself as
    it starts.
    """

    name = "local pool"

    def __init__(self, jobs=None):
        jobs = (os.cpu_count() or 1) if jobs is None else jobs
        if jobs < 1:
            raise SweepError("--jobs", "jobs", jobs, "expected a whole number >= 1")
        self.jobs = jobs
        self.slots = 2 * jobs
        self._context = mp.get_context()
        self._traces = ()
        self._pool = None          # started by the first submit, after prepare
        self._futures = {}

    def prepare(self, traces):
        self._traces = tuple(traces)
        if self._context.get_start_method() == "fork":
            prepare(self._traces)

    def submit(self, task):
        if self._pool is None:
            self._pool = self._new_pool()
        try:
            fut = self._pool.submit(run_point, *task.args)
        except cf.process.BrokenProcessPool:
            self._renew()
            fut = self._pool.submit(run_point, *task.args)
        self._futures[fut] = task

    def _renew(self):
        self._pool.shutdown(wait=False, cancel_futures=True)
        self._pool = self._new_pool()

    def _new_pool(self):
        # under fork the initializer finds everything inherited and returns at once
        return cf.ProcessPoolExecutor(max_workers=self.jobs, mp_context=self._context, initializer=prepare,
                                      initargs=(self._traces, True))

    def wait(self):
        done, _ = cf.wait(list(self._futures), return_when=cf.FIRST_COMPLETED)
        out, broken = [], False
        for fut in done:
            task = self._futures.pop(fut)
            try:
                out.append((task, fut.result()))
            except cf.process.BrokenProcessPool as exc:
                broken = True
                out.append((task, ("lost", f"worker process died ({exc})", None)))
        if broken:
            # the rest of this pool's futures fail the same way; hand them back now
            for fut, task in list(self._futures.items()):
                if fut.done() and not fut.cancelled() and fut.exception() is None:
                    out.append((task, fut.result()))
                else:
                    out.append((task, ("lost", "worker process died", None)))
            self._futures.clear()
            self._renew()
        return out

    def pending(self):
        return len(self._futures)

    def close(self):
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)


class TLSFiles:
    """The files a client needs to reach a Dask scheduler over ``tls://``.

    ``ca``: the certificate authority that signed the cluster's certificates;
    ``cert``: this client's certificate; ``key``: its private key (None when
    the certificate file holds it). Any of them left None is taken from Dask's
    own configuration (``distributed.comm.tls.ca-file``,
    ``distributed.comm.tls.client.cert``, ``distributed.comm.tls.client.key``).
    """

    OPTIONS = {"ca": "--cluster-ca", "cert": "--cluster-cert", "key": "--cluster-key"}

    def __init__(self, ca=None, cert=None, key=None):
        self.ca, self.cert, self.key = ca, cert, key

    def given(self):
        return [name for name in self.OPTIONS if getattr(self, name) is not None]

    def check(self):
        """Every file given must be a readable file (an error names the option)."""
        for name in self.given():
            path = getattr(self, name)
            if not os.path.isfile(path):
                raise SweepError(self.OPTIONS[name], name, path, "file not found (expected a PEM file)")
            try:
                with open(path, "rb") as fh:
                    fh.read(1)
            except OSError as exc:
                raise SweepError(self.OPTIONS[name], name, path, f"cannot be read ({exc.strerror})") from None

    def validate(self, address):
        """Check the address and the files before anything runs; True when the address is ``tls://``."""
        if not isinstance(address, str) or "://" not in address \
                or address.split("://", 1)[0] not in ("tcp", "tls"):
            raise SweepError("--cluster", "cluster", address,
                             "expected a scheduler address tcp://HOST:PORT or tls://HOST:PORT")
        if not address.startswith("tls://"):
            if self.given():
                raise SweepError("--cluster", "cluster", address,
                                 f"{', '.join(self.OPTIONS[n] for n in self.given())} given: expected a "
                                 "tls://HOST:PORT address")
            return False
        self.check()
        ca, cert = self.ca, self.cert
        if ca is None or cert is None:
            try:
                import dask.config
            except ImportError:   # the backend says what to install
                return True
            ca = ca or dask.config.get("distributed.comm.tls.ca-file", None)
            cert = cert or dask.config.get("distributed.comm.tls.client.cert", None)
        if not ca or not cert:
            raise SweepError("--cluster", "cluster", address,
                             "a tls:// scheduler needs a CA and a client certificate: --cluster-ca and "
                             "--cluster-cert (and --cluster-key), or Dask's distributed.comm.tls settings")
        return True

    def security(self, address):
        """A :class:`distributed.Security` for ``address`` (None for a plain ``tcp://`` address)."""
        from distributed import Security

        if not self.validate(address):
            return None
        kw = {k: v for k, v in (("tls_ca_file", self.ca), ("tls_client_cert", self.cert),
                                ("tls_client_key", self.key)) if v is not None}
        return Security(require_encryption=True, **kw)


class DaskBackend:
    """Tasks on a Dask distributed scheduler: an existing one or a local cluster.

    ``address`` (``tcp://HOST:PORT`` or ``tls://HOST:PORT``) connects to a
    running scheduler, failing within :data:`CONNECT_TIMEOUT_S` seconds; a
    ``tls://`` address uses ``tls`` (:class:`TLSFiles`: CA, certificate, key)
    for mutual TLS. ``workers=N`` starts a local cluster of N single-threaded
    worker processes on 127.0.0.1 instead. Remote workers need this package
    installed and the traces at the same paths.

    Dask ships tasks and results as pickles: whoever can reach a scheduler
    without TLS can run code on its workers, and a scheduler can send this
    process data that runs code when unpickled. Use TLS (or a private network)
    for any cluster others can reach.
    """

    name = "dask"

    def __init__(self, address=None, workers=None, tls=None):
        try:
            import distributed
        except ImportError:
            raise SweepError("--cluster" if address else "--workers", "backend", "dask",
                             "needs the sweep extra: pip install dask distributed") from None
        self._cluster = None
        if address is not None:
            security = (tls or TLSFiles()).security(address)
            try:
                self._client = distributed.Client(address, timeout=CONNECT_TIMEOUT_S, set_as_default=False,
                                                  security=security)
            except (OSError, TimeoutError) as exc:
                why = type(exc).__name__
                if address.startswith("tls://"):
                    why += "; with TLS, check that the CA signed the scheduler's certificate and yours"
                raise SweepError("--cluster", "cluster", address,
                                 f"no Dask scheduler answered within {CONNECT_TIMEOUT_S} s ({why})") from None
            self.name = f"dask at {address}"
        else:
            if workers < 1:
                raise SweepError("--workers", "workers", workers, "expected a whole number >= 1")
            self._cluster = distributed.LocalCluster(n_workers=workers, threads_per_worker=1,
                                                     processes=True, host="127.0.0.1",
                                                     dashboard_address=None)
            self._client = distributed.Client(self._cluster, set_as_default=False)
            self.name = f"local dask cluster, {workers} workers"
        n = sum(self._client.nthreads().values())
        self.slots = max(4, 2 * n)
        self._futures = {}
        self._attempt = 0
        self._done = distributed.as_completed(loop=self._client.loop)

    def prepare(self, traces):
        """Ready every worker (and any that joins later) before the first point."""
        from .dask_plugin import ReadyWorker

        try:
            self._client.register_plugin(ReadyWorker(traces))
        except Exception:  # noqa: BLE001 - e.g. a worker of another build; its points still run
            pass

    def worker_reports(self):
        """``{worker address: {"prepared": prepare() report, "rss": bytes}}`` (for benchmarks)."""
        from .dask_plugin import worker_report

        return self._client.run(worker_report)

    def submit(self, task):
        self._attempt += 1
        fut = self._client.submit(run_point, *task.args, key=f"attnsim-point-{task.key}-{self._attempt}",
                                  pure=False)
        self._futures[fut] = task
        self._done.add(fut)

    def wait(self):
        done = [next(self._done)] + self._done.next_batch(block=False)
        out = []
        for fut in done:
            task = self._futures.pop(fut)
            if fut.status == "finished":
                out.append((task, fut.result()))
            else:
                try:
                    exc = fut.exception()
                    line = f"{type(exc).__name__}: {' '.join(str(exc).split())}"
                except Exception as e:  # cancelled futures raise here
                    line = f"{type(e).__name__}"
                out.append((task, ("lost", line, None)))
            fut.release()
        return out

    def pending(self):
        return len(self._futures)

    def close(self):
        for fut in self._futures:
            fut.cancel()
        self._futures.clear()
        self._client.close()
        if self._cluster is not None:
            self._cluster.close()


def make_backend(jobs=None, cluster=None, workers=None, security=None):
    """The backend the command line asked for (one of the three); ``security`` is a :class:`TLSFiles`."""
    if cluster is not None:
        return DaskBackend(address=cluster, tls=security)
    if workers is not None:
        return DaskBackend(workers=workers)
    if jobs == 1:
        return SerialBackend()
    return PoolBackend(jobs)
