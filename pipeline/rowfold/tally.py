"""Finished-task counts from a Dask scheduler, for progress (see :mod:`rowfold.progress`).

:class:`TaskTally` is a ``SchedulerPlugin`` (Dask's public plugin interface): installed with
``Client.register_plugin``, it counts per client the tasks each graph brought and those that
finished; :func:`tally_of` reads the counts through ``Client.run_on_scheduler``. Both run on
the scheduler, which must be able to import rowfold; when it cannot, the engine counts its
own finished futures instead (coarser).
"""

from __future__ import annotations

from typing import Any

from distributed.diagnostics.plugin import SchedulerPlugin


class TaskTally(SchedulerPlugin):
    """Counts, per client, the tasks a Dask scheduler received and finished.

    Keys are remembered with their client until the scheduler forgets them, so that a
    shared scheduler's other clients do not count.
    """

    def __init__(self) -> None:
        self.counts: dict[str, list[int]] = {}
        self.owner: dict[Any, str] = {}

    def update_graph(self, scheduler: Any, *, client: str, tasks: Any, **kwargs: Any) -> None:
        """Count the tasks a client sent."""
        counts = self.counts.setdefault(client, [0, 0])
        counts[0] += len(tasks)
        for key in tasks:
            self.owner[key] = client

    def transition(self, key: Any, start: str, finish: str, *args: Any, **kwargs: Any) -> None:
        """Count a task that finished (in memory, or erred)."""
        if finish == "forgotten":
            self.owner.pop(key, None)
        elif start == "processing" and finish in ("memory", "erred"):
            client = self.owner.get(key)
            if client is not None:
                self.counts.setdefault(client, [0, 0])[1] += 1


def tally_of(dask_scheduler: Any, name: str, client: str) -> tuple[int, int]:
    """(tasks received, tasks finished) for ``client`` from the plugin ``name``."""
    plugin = dask_scheduler.plugins.get(name)
    counts = [0, 0] if plugin is None else plugin.counts.get(client, [0, 0])
    return counts[0], counts[1]
