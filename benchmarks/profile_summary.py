"""Summarise a py-spy profile of a rowfold run: where the worker threads spend their time.

Record a run with py-spy's collapsed-stack output, then summarise it::

    pip install py-spy
    py-spy record -r 200 --threads --format raw -o run.raw -- \\
        python -m rowfold --quiet run benchmarks/results/tsqr_4000000x64.job.yaml
    python benchmarks/profile_summary.py run.raw

The table gives, for the Dask worker threads only, the share of samples whose innermost frame
is each function ("self") and the share whose stack contains it ("inclusive").
"""

from __future__ import annotations

import argparse
import collections
import re
from collections.abc import Iterable
from pathlib import Path

WORKER_THREAD = "Dask-Default-Threads"
LOCATION = re.compile(r" \(.*?\)")


def read_stacks(path: Path, thread: str) -> Iterable[tuple[list[str], int]]:
    """(frames without file locations, sample count) of every stack of the matching threads."""
    for line in path.read_text(encoding="utf-8").splitlines():
        stack, _, count = line.rpartition(" ")
        frames = stack.split(";")
        if not frames or thread not in frames[0]:
            continue
        yield [LOCATION.sub("", frame) for frame in frames[1:]], int(count)


def summarise(
    stacks: Iterable[tuple[list[str], int]],
) -> tuple[int, collections.Counter[str], collections.Counter[str]]:
    """Total samples, samples by innermost function and samples by any function on the stack."""
    own: collections.Counter[str] = collections.Counter()
    anywhere: collections.Counter[str] = collections.Counter()
    total = 0
    for frames, count in stacks:
        total += count
        if frames:
            own[frames[-1]] += count
        for name in set(frames):
            anywhere[name] += count
    return total, own, anywhere


def main() -> None:
    """Print the summary table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("profile", type=Path, help="py-spy --format raw output")
    parser.add_argument("--top", type=int, default=20, help="rows per table (20)")
    parser.add_argument("--thread", default=WORKER_THREAD, help="thread name to keep")
    opts = parser.parse_args()
    total, own, anywhere = summarise(read_stacks(opts.profile, opts.thread))
    if not total:
        raise SystemExit(f"{opts.profile}: no samples from threads named {opts.thread!r}")
    print(f"{total} samples from {opts.thread} threads")
    for title, counter in (("self", own), ("inclusive", anywhere)):
        print(f"\n{title:>9}  function")
        for name, count in counter.most_common(opts.top):
            print(f"{100 * count / total:8.1f}%  {name}")


if __name__ == "__main__":
    main()
