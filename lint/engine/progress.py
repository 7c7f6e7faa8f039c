"""Progress of a scan as it goes: what the engine reports, and the display on a terminal.

The engine knows only the :class:`Progress` interface: ``start`` with the shards, ``batch`` after every batch it
fed to the rules, ``shard_done`` when a shard is finished, ``close`` at the end. Where shards are scanned in other
processes, an executor gives the engine a stand-in (:class:`QueueProgress`) whose events travel back through a
queue and are replayed into the real object by one thread of this process (:func:`relay`).  On a Dask cluster the
stand-in (:class:`corpuscle.engine.executors.TopicProgress`) sends them as Dask events to the client, so a cluster scan also
reports every batch.

Bytes consumed per batch (what the bar advances by) are what the reader reports: for Parquet the compressed size
of the row group read (from the file metadata), shared out over its batches by rows; for Arrow IPC the buffer size
of the record batch; for JSON Lines the position in the file as stored (the compressed position for ``.gz`` and
``.zst``). Skipped parts of a sampled shard count as consumed. When a shard is done the bar is topped up to the
shard's full size, so footers and headers are counted too and the bar ends at 100%.
"""
from __future__ import annotations

import contextlib
import threading
import time

import click


class Progress:
    """Events of a scan; every method does nothing here. Subclasses override what they show."""

    def start(self, shards) -> None:
        """The scan is about to read ``shards`` (each with ``uri`` and ``length`` in bytes)."""

    def batch(self, uri: str, rows: int, tokens: int, nbytes: int) -> None:
        """One batch of shard ``uri`` was fed to the rules: its rows, tokens, and bytes of the file consumed."""

    def shard_done(self, uri: str, rows: int, tokens: int) -> None:
        """Shard ``uri`` is finished (``rows`` and ``tokens`` scanned in it in all)."""

    def close(self) -> None:
        """The scan is over (also when it failed)."""


def _short(n: float) -> str:
    """1234 -> '1.2k', 41_200_000 -> '41.2M'."""
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if n >= size:
            return f"{n / size:.1f}{unit}"
    return f"{n:.0f}"


class TerminalProgress(Progress):
    """A progress bar on ``stream`` (a terminal): bytes done of all shards, shards done, tokens, rate and ETA.

    Drawn with :func:`click.progressbar`; its length is the total size of the shards in bytes, and the ETA is
    click's, from the bytes still to read. The text beside the bar reads ``shards 3/12 · 41.2M tokens · 18.3M
    tok/s`` (rows and rows/s for text shards, which have no tokens).
    """

    def __init__(self, stream):
        self.stream = stream
        self.bar = None

    def start(self, shards) -> None:
        self.total = len(shards)
        self.length = {s.uri: max(int(s.length), 0) for s in shards}
        self.advanced = dict.fromkeys(self.length, 0)
        self.done = 0
        self.rows = 0
        self.tokens = 0
        self.started = time.perf_counter()
        self.bar = click.progressbar(length=max(1, sum(self.length.values())), file=self.stream, width=24,
                                     show_eta=True, show_percent=True, item_show_func=self._text)
        self.bar.__enter__()

    def _text(self, _item=None) -> str:
        elapsed = max(1e-9, time.perf_counter() - self.started)
        if self.tokens or not self.rows:
            amount, unit = self.tokens, "tokens"
        else:
            amount, unit = self.rows, "rows"
        rate = f"{_short(amount / elapsed)} {'tok' if unit == 'tokens' else 'rows'}/s"
        return f"shards {self.done}/{self.total} · {_short(amount)} {unit} · {rate}"

    def _advance(self, uri: str, nbytes: int) -> None:
        room = self.length.get(uri, 0) - self.advanced.get(uri, 0)
        step = max(0, min(int(nbytes), room))
        self.advanced[uri] = self.advanced.get(uri, 0) + step
        self.bar.update(step)

    def batch(self, uri, rows, tokens, nbytes) -> None:
        if self.bar is None:
            return
        self.rows += rows
        self.tokens += tokens
        self._advance(uri, nbytes)

    def shard_done(self, uri, rows, tokens) -> None:
        if self.bar is None:
            return
        self.done += 1
        self._advance(uri, self.length.get(uri, 0))  # the rest of the shard: headers, footers, skipped parts

    def close(self) -> None:
        if self.bar is not None:
            self.bar.render_progress()
            self.bar.__exit__(None, None, None)
            self.bar = None


class QueueProgress(Progress):
    """The stand-in for a :class:`Progress` in another process: puts each event on ``queue`` (a
    ``multiprocessing`` manager queue, which pickles with the work sent to the process)."""

    def __init__(self, queue):
        self.queue = queue

    def _put(self, event: tuple) -> None:
        try:
            self.queue.put(event)
        except (OSError, EOFError):  # the display is gone: the scan goes on without it
            pass

    def batch(self, uri, rows, tokens, nbytes) -> None:
        self._put(("batch", uri, rows, tokens, nbytes))

    def shard_done(self, uri, rows, tokens) -> None:
        self._put(("shard_done", uri, rows, tokens))


@contextlib.contextmanager
def relay(target: Progress, context):
    """Yield a :class:`QueueProgress` whose events, put in any process, are replayed into ``target`` by a thread
    of this process. ``context`` is the ``multiprocessing`` context whose manager holds the queue. On exit the
    events still queued are replayed before the thread stops."""
    with context.Manager() as manager:
        queue = manager.Queue()

        def drain():
            while True:
                try:
                    event = queue.get()
                except (OSError, EOFError):  # the manager is gone (the scan was interrupted): stop quietly
                    return
                if event is None:
                    return
                try:
                    getattr(target, event[0])(*event[1:])
                except Exception:  # noqa: BLE001 - a display problem must never stop the scan
                    pass

        thread = threading.Thread(target=drain, name="corpuscle-progress", daemon=True)
        thread.start()
        try:
            yield QueueProgress(queue)
        finally:
            try:
                queue.put(None)
            except (OSError, EOFError):
                pass
            thread.join(timeout=10)
