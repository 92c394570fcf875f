"""Chunk progress on the terminal while a flow runs."""

from __future__ import annotations

import sys
import threading


class _progress:
    """Show chunk progress by reading the outputs' done flags while a flow runs.

    Progress comes from the workspace itself, so it is right whatever the runner (threads,
    processes, a Dask cluster) and whichever process writes the chunks.
    """

    def __init__(self, url: str, records: str, kinds: tuple[str, ...], silent: bool, status: str = ""):
        self.url, self.records, self.kinds, self.silent = url, records, kinds, silent
        self.status = status  # a spinner line with elapsed time, for steps without chunks
        self._stop = threading.Event()

    def __enter__(self):
        if self.silent or not sys.stderr.isatty():
            return self
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

        self._bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                             TimeElapsedColumn(), transient=False)
        self._bar.start()
        self._tasks: dict[str, int] = {}
        if self.status:
            self._bar.add_task(self.status, total=None)  # indeterminate: a pulsing bar
        self._thread = threading.Thread(target=self._poll, daemon=True)
        self._thread.start()
        return self

    def _poll(self) -> None:
        from atomline.stages.workspace import Workspace

        while not self._stop.wait(1.0):
            try:
                ws = Workspace.open(self.url)
                for kind in self.kinds:
                    for dict_id in ws.root[kind].group_keys():
                        path = f"{kind}/{dict_id}/{self.records}"
                        if not ws.has_output(path):
                            continue
                        flags = ws.output(path).done_flags()
                        if path not in self._tasks:
                            label = "encoding" if kind == "codes" else "pooling"
                            self._tasks[path] = self._bar.add_task(f"{label} {dict_id}", total=flags.size)
                        self._bar.update(self._tasks[path], completed=int(flags.sum()))
            except Exception:  # progress display must never break the run it watches
                continue

    def __exit__(self, *exc):
        if hasattr(self, "_bar"):
            self._stop.set()
            self._thread.join()
            self._bar.stop()
        return False
