"""Where shards are scanned: in this process, in a local pool of processes, or on a Dask cluster.  An executor maps
a function over work items and yields the results in the order of the items, so the report is the same whatever
runs the work.

An executor may also run a *keyed shuffle* (``map_shuffle``): map a function over the items, split each result
where it lies into a part to keep and one piece per partition, reduce each partition's pieces, and return the kept
parts (in item order) and the reduced partials (in partition order).  :class:`LocalExecutor` does the split and the
reduce in this process; :class:`DaskExecutor` runs them as tasks on the workers, so the pieces never travel to this
process.  ``partitions`` says how many partitions the executor wants.

An executor may also give a ``relay(progress)`` context manager: it yields the stand-in for ``progress`` that
travels with the work and reaches ``progress`` in this process from where the work runs, so a display moves after
every batch (see :mod:`corpuscle.engine.progress`).
"""
from __future__ import annotations

import contextlib
import logging
import multiprocessing
import os
import shutil
import tempfile
import threading
import time
import uuid
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Callable, Iterable, Iterator

from corpuscle.engine.progress import Progress
from corpuscle.engine.registry import FAMILIES
from corpuscle.kernels.spill import run_folder

#: How to install what ``--cluster`` needs.
CLUSTER_INSTALL = "pip install 'corpuscle[cluster]'"


class ClusterUnavailable(Exception):
    """A cluster cannot be used: the ``distributed`` package is missing, or the scheduler cannot be reached."""


def shuffle_here(results: Iterable, split: Callable, reduce: Callable, parts: int):
    """A keyed shuffle in this process over ``results`` already computed (or arriving): see the module notes.

    Returns ``(kept, partials)``: an iterator of the kept part of each result, in order, and a function that gives
    the list of partials once that iterator is exhausted."""
    pieces: list[list] = []

    def kept():
        for result in results:
            part, parted = split(result, parts)
            pieces.append(parted)
            yield part

    def partials() -> list:
        return [reduce([parted[p] for parted in pieces]) for p in range(parts)]

    return kept(), partials


#: Partitions of a local keyed shuffle. One partition is reduced at a time, so more partitions bound the peak
#: memory of the reduce: scanning a 2 GB shard for duplicates peaked at 455 MiB with 1 and 337 MiB with 16
#: (a 0.5 GB shard: 296 and 298 MiB).
LOCAL_PARTITIONS = 16

#: Modules the local pool's fork server loads before it forks workers: the engine and the built-in rules.
PRELOAD = ["corpuscle.engine.scan", *(f"corpuscle.rules.{family}" for family in FAMILIES)]


def _one_arrow_thread() -> None:
    """In a pool process: decode with one Arrow thread, since the pool already gives each core a process (Arrow's
    own thread pool would have the processes compete for the same cores)."""
    import pyarrow

    pyarrow.set_cpu_count(1)


#: How often a pool process checks that the process that started the scan is still alive, in seconds.
WATCH_SECONDS = 1.0


def _pool_process(parent: int) -> None:
    """Initializer of a pool process: one Arrow thread (:func:`_one_arrow_thread`); Ctrl-C is the parent's to
    handle (it stops the pool); and a watch that ends this process when the scan's process ``parent`` is gone (it
    was killed, e.g. by SIGKILL, and can no longer stop its pool), so no orphan keeps scanning."""
    import signal

    _one_arrow_thread()
    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watch() -> None:
        while True:
            time.sleep(WATCH_SECONDS)
            if not _alive(parent):
                os._exit(1)

    threading.Thread(target=watch, name="corpuscle-parent-watch", daemon=True).start()


def _alive(pid: int) -> bool:
    """Whether a process ``pid`` exists on this machine (a zombie counts as gone)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[1].split()[0] != b"Z"
    except OSError:
        return True


def stop_pool(pool) -> None:
    """Stop a process pool at once: pending work is cancelled and its processes are ended (SIGTERM), without
    waiting for the work they are doing (what ``shutdown(wait=True)`` would do on an interrupt)."""
    processes = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        with contextlib.suppress(Exception):
            process.terminate()
    for process in processes:
        with contextlib.suppress(Exception):
            process.join(5)


@contextlib.contextmanager
def _arrow_threads(most: int):
    """Arrow decodes with at most ``most`` threads inside the block (its CPU thread pool), as before after it."""
    import pyarrow

    before = pyarrow.cpu_count()
    pyarrow.set_cpu_count(max(1, min(most, before)))
    try:
        yield
    finally:
        pyarrow.set_cpu_count(before)


class _SharedWork:
    """Items done by this process and a pool of ``workers`` processes together, results in item order.

    The pool takes items from the front, one more each time one of its processes finishes one (so none waits while
    work is left); this process takes them from the back, with one Arrow thread, until the two meet.  So this
    process works while the pool's processes start (the fork server imports the engine first: a few tenths of a
    second), and ``jobs`` cores are busy with ``jobs - 1`` pool processes.
    """

    def __init__(self, fn: Callable, items: list, workers: int, context):
        self.fn, self.items, self.workers, self.context = fn, items, workers, context
        self.lock = threading.Lock()
        self.front, self.back = 0, len(items)  # items[front:back] are not taken yet
        self.futures: dict = {}

    def _take(self, from_back: bool) -> int | None:
        with self.lock:
            if self.front >= self.back:
                return None
            if from_back:
                self.back -= 1
                return self.back
            self.front += 1
            return self.front - 1

    def _feed(self, pool) -> None:
        """Give the pool its next item (from the front), if any is left."""
        i = self._take(from_back=False)
        if i is None:
            return
        try:
            future = pool.submit(self.fn, self.items[i])
        except RuntimeError:  # the pool is broken or shutting down: the item is left to this process
            return
        self.futures[i] = future
        future.add_done_callback(lambda _: self._feed(pool))

    def results(self) -> Iterator:
        done = {}
        pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=self.context, initializer=_pool_process,
                                   initargs=(os.getpid(),))
        try:
            # Starting a pool process waits for the fork server to import the engine: let another thread wait.
            starter = threading.Thread(target=lambda: [self._feed(pool) for _ in range(self.workers)], daemon=True)
            starter.start()
            with _arrow_threads(1):
                while (i := self._take(from_back=True)) is not None:
                    done[i] = self.fn(self.items[i])
            starter.join()
            for i in range(len(self.items)):
                future = self.futures.pop(i, None)
                if i in done:
                    yield done.pop(i)
                    continue
                if future is not None:
                    try:
                        yield future.result()
                        continue
                    except BrokenProcessPool:  # its process died (killed, out of memory): redo the item here
                        pass
                # the pool could not take it (broken, or shutting down after an error), or its process died
                with _arrow_threads(1):
                    result = self.fn(self.items[i])
                yield result
        except BaseException:  # an error, Ctrl-C, SIGTERM, or the caller stopped early: stop the pool now
            stop_pool(pool)
            raise
        pool.shutdown(wait=True)


class LocalExecutor:
    """Runs work in this process (``jobs=1``, or a single item), or in this process and a pool of ``jobs - 1``
    processes (see :class:`_SharedWork`).

    ``jobs`` is the number of cores the work may keep busy: a pool process decodes with one Arrow thread, and work
    run in this process with at most ``jobs`` (so ``jobs=1`` is one core, not one process plus Arrow's threads on
    the others).  The pool starts its processes with forkserver rather than fork: a child forked from a process
    whose Arrow thread pools are running can deadlock.
    """

    def __init__(self, jobs: int = 1, partitions: int = LOCAL_PARTITIONS):
        if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
            raise ValueError(f"jobs must be a whole number >= 1, got {jobs!r} (hint: the number of cores)")
        if isinstance(partitions, bool) or not isinstance(partitions, int) or partitions < 1:
            raise ValueError(f"partitions must be a whole number >= 1, got {partitions!r} (hint: {LOCAL_PARTITIONS})")
        self.jobs = jobs
        #: Partitions of a keyed shuffle (the results do not depend on it): each partition is reduced on its own,
        #: so the reduce holds about 1/partitions of the keys at a time.
        self.partitions = partitions

    def map(self, fn: Callable, items: Iterable) -> Iterator:
        items = list(items)
        if self.jobs == 1 or len(items) < 2:
            with _arrow_threads(self.jobs):
                yield from map(fn, items)
            return
        yield from _SharedWork(fn, items, min(self.jobs, len(items)) - 1, self._context()).results()

    def map_shuffle(self, fn: Callable, items: Iterable, split: Callable, reduce: Callable):
        """``map`` then a keyed shuffle of the results in this process (see the module notes)."""
        return shuffle_here(self.map(fn, items), split, reduce, self.partitions)

    @staticmethod
    def _context():
        if os.name != "posix":
            return multiprocessing.get_context("spawn")
        context = multiprocessing.get_context("forkserver")
        # The fork server imports the engine and the rules once; every worker forked from it starts with them
        # loaded instead of importing pyarrow, numpy and the rules again.
        context.set_forkserver_preload(PRELOAD)
        return context

    def relay(self, progress):
        """A context manager giving the progress object to pass to the work: ``progress`` itself in this process
        (``jobs=1``), else a stand-in whose events reach ``progress`` from the pool's processes through a manager
        queue (see :func:`corpuscle.engine.progress.relay`)."""
        if self.jobs == 1:
            return contextlib.nullcontext(progress)
        from corpuscle.engine.progress import relay

        return relay(progress, self._context())

    def describe(self) -> str:
        return "this process" if self.jobs == 1 else f"{self.jobs} local processes"


def _distributed():
    """The ``distributed`` module, imported only when a cluster is asked for (an optional dependency)."""
    try:
        import distributed
    except ImportError:
        raise ClusterUnavailable(f"running on a Dask cluster needs the distributed package: {CLUSTER_INSTALL}") \
            from None
    return distributed


def local_security():
    """``distributed.security.Security.temporary()``: a self-signed certificate and key made for this run, required
    of every connection (TLS both ways).  Needs the ``cryptography`` package (in the ``cluster`` extra)."""
    from distributed.security import Security

    try:
        return Security.temporary()
    except ImportError:
        raise ClusterUnavailable(f"--cluster local secures its scheduler with TLS, which needs the cryptography "
                                 f"package: {CLUSTER_INSTALL}") from None


def _kept(half):
    return half[0]


def _once_more(future, again: Callable):
    """The future's result; when its task was given up because workers died while running it (``KilledWorker``),
    the result of the task ``again()`` submits anew, once.  A dying worker takes with it every task waiting on it,
    not only the one that killed it: an innocent task gets another go, a task that kills its worker dies again."""
    try:
        return future.result()
    except Exception as exc:  # noqa: BLE001 - distributed.KilledWorker, told by name (distributed is optional)
        if type(exc).__name__ != "KilledWorker":
            raise
    return again().result()


def _result_or(future, again: Callable, item, failed: Callable | None):
    """The future's result (see :func:`_once_more`), or ``failed(item, exc)`` when its task failed for good and
    ``failed`` is given."""
    try:
        return _once_more(future, again)
    except Exception as exc:  # noqa: BLE001 - KilledWorker twice, or an error the task raised
        if failed is None:
            raise
        return failed(item, exc)


def _piece(half, partition: int):
    return half[1][partition]


#: How long leaving :meth:`DaskExecutor.relay` waits for the workers' last progress events, in seconds.
RELAY_FLUSH_SECONDS = 10.0


class TopicProgress(Progress):
    """The stand-in for a :class:`~corpuscle.engine.progress.Progress` on a Dask cluster (see :meth:`DaskExecutor.relay`).

    In a task on a worker, each event is logged under ``topic`` with the worker's ``log_event``: it travels on the
    worker's stream to the scheduler, which forwards it to the client subscribed to the topic.  Called anywhere
    else (this process, where the relay was opened), it goes straight to the target, under the relay's lock.  It
    pickles as its topic alone; a copy unpickled outside a worker has nowhere to send its events and drops them.
    """

    def __init__(self, topic: str, relay: "_TopicRelay | None" = None):
        self.topic = topic
        self._relay = relay

    def __getstate__(self) -> dict:
        return {"topic": self.topic}

    def __setstate__(self, state: dict) -> None:
        self.topic = state["topic"]
        self._relay = None

    def _send(self, event: list) -> None:
        try:
            from distributed import get_worker

            worker = get_worker()
        except (ImportError, ValueError):  # ValueError: not in a task on a worker
            worker = None
        if worker is not None:
            try:
                worker.log_event(self.topic, event)
            except Exception:  # noqa: BLE001 - a lost progress event must never stop the scan
                pass
        elif self._relay is not None:
            self._relay.replay(event)

    def batch(self, uri, rows, tokens, nbytes) -> None:
        self._send(["batch", str(uri), int(rows), int(tokens), int(nbytes)])

    def shard_done(self, uri, rows, tokens) -> None:
        self._send(["shard_done", str(uri), int(rows), int(tokens)])


class _TopicRelay:
    """The client side of :meth:`DaskExecutor.relay`: replays the events of one topic into ``target``, one call at a
    time, and tells when every worker has flushed its events."""

    def __init__(self, target: Progress):
        self.target: Progress | None = target
        self.lock = threading.Condition()
        self.flushed: set[str] = set()  # workers whose flush marker arrived

    def heard(self, event) -> None:
        """The topic's handler, called on the client's event-loop thread with ``(timestamp, message)``; messages
        are lists (msgpack turns tuples into lists)."""
        try:
            _, message = event
            kind, *args = message
        except (TypeError, ValueError):
            return
        if kind == "flushed":
            with self.lock:
                self.flushed.add(args[0])
                self.lock.notify_all()
            return
        self.replay([kind, *args])

    def replay(self, event: list) -> None:
        kind, *args = event
        if kind not in ("batch", "shard_done"):
            return
        with self.lock:
            if self.target is None:  # the relay is closed: a late event is dropped
                return
            try:
                getattr(self.target, kind)(*args)
            except Exception:  # noqa: BLE001 - a display problem must never stop the scan
                pass

    def flush(self, client, topic: str, timeout: float) -> bool:
        """Have every worker log a marker after its events and wait (at most ``timeout`` seconds) until all markers
        arrived.  A worker's events reach the client in the order it logged them, so its marker comes last."""
        try:
            workers = client.run(_mark_flushed, topic, on_error="ignore")
        except Exception:  # noqa: BLE001 - the cluster is going away: nothing more will arrive
            return False
        with self.lock:
            return self.lock.wait_for(lambda: set(workers) <= self.flushed, timeout)

    def close(self) -> None:
        with self.lock:
            self.target = None


def _mark_flushed(topic: str, dask_worker) -> None:
    """On a worker's event loop (``Client.run``): log the flush marker after every event logged before."""
    dask_worker.log_event(topic, ["flushed", dask_worker.address])


class DaskExecutor:
    """Runs work on a Dask cluster: the scheduler at ``address`` (e.g. ``tcp://scheduler.example:8786``), or, for
    ``address="local"``, a ``distributed.LocalCluster`` started here: ``jobs`` worker processes (default: the number
    of cores) of one thread each, listening on the loopback interface only, with no dashboard.

    Use it as a context manager: entering connects (and starts the local cluster), leaving closes what it started.
    The workers must import corpuscle (and any plugin rules) and read the shards at the paths they are given:
    absolute paths on a file system every worker mounts at the same place, or URIs (``s3://``, ``gs://``,
    ``hdfs://``, ``file://``).  In ``map_shuffle`` the per-shard results stay on the workers: the split and the
    per-partition reduce run there too, and only the kept parts and the partials come back.
    """

    #: The workers' working directory is not this process's: the engine sends them absolute paths.
    absolute_paths = True
    #: ``map`` and ``map_shuffle`` take ``failed(item, exc)``: the stand-in result of an item that failed for good.
    gives_up_per_item = True

    def __init__(self, address: str, jobs: int | None = None, timeout: float = 30.0):
        if not isinstance(address, str) or not address.strip():
            raise ValueError(f"cluster must be 'local' or a scheduler address such as tcp://scheduler.example:8786, "
                             f"got {address!r}")
        if jobs is not None and (isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1):
            raise ValueError(f"jobs must be a whole number >= 1, got {jobs!r} (hint: the number of cores)")
        self.address = address.strip()
        self.jobs = jobs
        self.timeout = timeout
        self.client = None
        self._cluster = None
        self._scratch = None
        #: The TLS settings of a local cluster (:func:`local_security`), or None.
        self.security = None

    def __enter__(self) -> "DaskExecutor":
        distributed = _distributed()
        try:
            if self.address == "local":
                # The workers' files; removed in close(), or by a later run if this one is killed (see run_folder).
                self._scratch = run_folder(tempfile.gettempdir(), "corpuscle-dask")
                os.makedirs(self._scratch, mode=0o700)
                # TLS with a certificate made for this run alone (in memory, never on disk): the scheduler and the
                # workers accept only peers that hold it, so another user of this machine cannot connect to the
                # scheduler and run code on the workers (loopback is no boundary between users).
                self.security = local_security()
                self._cluster = distributed.LocalCluster(
                    n_workers=self.jobs or os.cpu_count() or 1, threads_per_worker=1, processes=True,
                    host="127.0.0.1", scheduler_port=0, dashboard_address=None, silence_logs=logging.ERROR,
                    local_directory=self._scratch, protocol="tls://", security=self.security,
                    # No dashboard; the scheduler's HTTP server (health checks) on a free loopback port, not 8787.
                    scheduler_kwargs={"dashboard_address": "127.0.0.1:0"})
                self.client = distributed.Client(self._cluster, timeout=self.timeout, security=self.security)
                # One task at a time per worker process, one core each: Arrow decodes with one thread, as in the
                # local pool (its own pool would have the workers compete for the same cores).
                self.client.run(_one_arrow_thread)
            else:
                self.client = distributed.Client(self.address, timeout=self.timeout)
        except (OSError, TimeoutError, ValueError, RuntimeError, TypeError) as exc:
            # RuntimeError: a worker did not start; TypeError: a TLS scheduler and no TLS settings here
            self.close()
            where = "start a local Dask cluster" if self.address == "local" else \
                f"connect to the Dask scheduler at {self.address}"
            raise ClusterUnavailable(f"cannot {where} ({type(exc).__name__}: {str(exc).strip()}); check that the "
                                     "scheduler is running and reachable from here (a tls:// scheduler needs Dask's "
                                     "TLS settings, see the README), or use --cluster local") from None
        return self

    def __exit__(self, *exc) -> bool:
        self.close()
        return False

    def close(self) -> None:
        """Close the client, and the local cluster if this executor started it."""
        client, cluster, self.client, self._cluster = self.client, self._cluster, None, None
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
        if self._scratch is not None:
            shutil.rmtree(self._scratch, ignore_errors=True)
            self._scratch = None

    def _connected(self):
        if self.client is None:
            raise RuntimeError("DaskExecutor is not connected; use it as a context manager: with DaskExecutor(...)")
        return self.client

    @property
    def workers(self) -> int:
        return len(self._connected().nthreads())

    @property
    def partitions(self) -> int:
        """Partitions of a keyed shuffle: one per worker thread of the cluster."""
        return max(1, sum(self._connected().nthreads().values()))

    def map(self, fn: Callable, items: Iterable, failed: Callable | None = None) -> Iterator:
        """Results of ``fn`` over ``items`` in order.  A task given up because workers died while running it
        (``KilledWorker``: more deaths than ``distributed.scheduler.allowed-failures``) is submitted once more (see
        :func:`_once_more`).  An item whose task fails for good (``KilledWorker`` again, or the task raised) gives
        ``failed(item, exc)`` in its place, so the other items' results are kept; without ``failed`` the error is
        raised."""
        client = self._connected()
        items = list(items)
        futures = client.map(fn, items, pure=False)
        for i, future in enumerate(futures):
            yield _result_or(future, lambda: client.submit(fn, items[i], pure=False), items[i], failed)
            futures[i] = None  # the result is here: let the cluster forget it

    def map_shuffle(self, fn: Callable, items: Iterable, split: Callable, reduce: Callable,
                    failed: Callable | None = None):
        """``map`` then a keyed shuffle, all as tasks on the cluster: per item a scan task, a split task and one
        small task per partition picking its piece; per partition a reduce task over the pieces of all items.

        An item whose scan fails for good gives ``failed(item, exc)`` in its place (see :meth:`map`), split like any
        result: the reduce tasks are sent once every item has its result or its stand-in, so one lost item does not
        fail the reduce of the others."""
        client = self._connected()
        parts = self.partitions
        items = list(items)
        scanned = client.map(fn, items, pure=False)
        halves = client.map(split, scanned, parts=parts, pure=False)
        kept = client.map(_kept, halves, pure=False)
        del scanned  # the scheduler keeps what pending tasks still need

        def again(i: int):
            halves[i] = client.submit(split, client.submit(fn, items[i], pure=False), parts=parts, pure=False)
            return client.submit(_kept, halves[i], pure=False)

        def results():
            for i, future in enumerate(kept):
                try:
                    result = _once_more(future, lambda: again(i))
                except Exception as exc:  # noqa: BLE001 - the item's scan (or its split) failed for good
                    if failed is None:
                        raise
                    # (a split task whose scan failed fails with the scan's error: that is the one told)
                    stand_in = split(failed(items[i], exc), parts)
                    halves[i] = client.scatter([stand_in], hash=False)[0]
                    result = stand_in[0]
                kept[i] = None
                yield result

        def partials() -> list:
            reduced = [client.submit(reduce, [client.submit(_piece, half, p, pure=False) for half in halves],
                                     pure=False) for p in range(parts)]
            return client.gather(reduced)

        return results(), partials

    @contextlib.contextmanager
    def relay(self, progress: Progress):
        """A context manager giving the progress object to pass to the work: a :class:`TopicProgress` whose
        events, sent from the tasks on the workers, reach ``progress`` in this process, one call at a time.

        The events travel as Dask events under a topic of their own (a new uuid per relay): the worker logs each
        one (``Worker.log_event``), the scheduler forwards it to this client, which subscribed to the topic before
        any work was sent, and the client's event-loop thread replays it into ``progress``.  Calls of the stand-in
        in this process go to ``progress`` directly, under the same lock.  On a normal exit every worker logs a
        marker after its events and the relay waits for all markers (at most :data:`RELAY_FLUSH_SECONDS`), so all
        events of the scan have reached ``progress`` when it returns; on an exit by an exception it does not wait.

        Limits: the events of a worker that leaves the cluster before its stream is sent are lost, and a task the
        scheduler runs again (its worker was lost) reports its batches again, so the counts can then differ from
        the shard's; events arriving after the exit are dropped.  The scheduler keeps the last events of each topic
        (``distributed.admin.low-level-log-length``, 1000 by default) until it stops, since Dask has no public call
        that drops a topic.
        """
        client = self._connected()
        topic = f"corpuscle-progress-{uuid.uuid4().hex}"
        here = _TopicRelay(progress)
        client.subscribe_topic(topic, here.heard)
        finished = False
        try:
            yield TopicProgress(topic, here)
            finished = True
        finally:
            try:
                if finished:
                    here.flush(client, topic, RELAY_FLUSH_SECONDS)
            finally:
                here.close()
                with contextlib.suppress(Exception):
                    client.unsubscribe_topic(topic)

    def describe(self) -> str:
        if self.client is None:
            return "a local Dask cluster" if self.address == "local" else f"the Dask cluster at {self.address}"
        workers = f"{self.workers} worker{'s' if self.workers != 1 else ''}"
        if self._cluster is not None:
            return f"a local Dask cluster ({workers}, scheduler {self.client.scheduler.address})"
        return f"the Dask cluster at {self.address} ({workers})"
