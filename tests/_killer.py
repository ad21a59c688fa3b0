"""Test helper: run the plcube command in this process and SIGKILL it at a chosen point.

    python tests/_killer.py POINT N ARGS...

POINT names a function (see ``POINTS``); the process kills itself with SIGKILL (no
cleanup, no ``finally``, as a power cut or the kernel's OOM killer would) at the N-th
time execution reaches it. POINT ``none`` runs the command normally. Every run sets
``pmap.results.WRITE_BLOCK_BYTES = 1`` and a small ``pmap.pipeline.MIN_CHUNK_MIB`` so a
small test cube has many write blocks.
"""

from __future__ import annotations

import os
import signal
import sys
import threading


def _die() -> None:
    sys.stdout.flush()
    sys.stderr.flush()
    os.kill(os.getpid(), signal.SIGKILL)


def _counting(n: int, real, *, after: bool = False):
    """``real`` wrapped: the n-th call dies before it runs (or just after, with ``after``)."""
    calls, lock = {"n": 0}, threading.Lock()

    def wrapper(*a, **k):
        with lock:  # block tasks run on several threads: each call gets its own number
            calls["n"] += 1
            mine = calls["n"]
        if mine == n and not after:
            _die()
        out = real(*a, **k)
        if mine == n and after:
            _die()
        return out

    return wrapper


def _half_block(n: int, real):
    """The n-th block task writes its first variable only, then dies (a block cut in two)."""
    import pmap.results as results

    calls, lock = {"n": 0}, threading.Lock()

    def wrapper(path, index, blocks):
        with lock:
            calls["n"] += 1
            mine = calls["n"]
        if mine == n:
            import zarr

            g = zarr.open_group(path, mode="r+")
            name, pieces = next(iter(blocks.items()))
            for idx, values in pieces:
                g[name][idx] = values
            _die()
        return real(path, index, blocks)

    results._write_block = wrapper


def arm(point: str, n: int) -> None:
    """Install the kill at ``point`` (its n-th arrival)."""
    import zarr

    import pmap.decomposition as decomposition
    import pmap.pipeline as pipeline
    import pmap.report as report
    import pmap.report_html as report_html
    import pmap.results as results
    import pmap.steps as steps

    if point == "none":
        return
    if point == "build":  # the start of the whole-map pass
        pipeline.build_result = _counting(n, pipeline.build_result)
    elif point == "whole_map":  # inside phase one (hot channels, fit template...)
        steps.WholeMapPass.compute = _counting(n, steps.WholeMapPass.compute)
    elif point == "metadata":  # after the global variables, before the map arrays
        results._metadata_template = _counting(n, results._metadata_template)
    elif point == "record":  # metadata and done-record written, not yet renamed into place
        results._create_done_array = _counting(n, results._create_done_array, after=True)
    elif point == "block":  # right after the n-th block is written and marked done
        results._write_block = _counting(n, results._write_block, after=True)
    elif point == "half_block":
        _half_block(n, results._write_block)
    elif point == "segment":  # while the regions are computed
        decomposition.segment = _counting(n, decomposition.segment)
    elif point == "stage":  # regions appended and recorded, store not yet complete
        pipeline.append_stage = _counting(n, pipeline.append_stage, after=True)
    elif point == "complete":  # at the start of completion
        pipeline.mark_complete = _counting(n, pipeline.mark_complete)
        results.mark_complete = _counting(n, results.mark_complete)
    elif point == "consolidate":  # done-record removed, metadata being consolidated
        zarr.consolidate_metadata = _counting(n, zarr.consolidate_metadata)
    elif point == "figure":  # writing the n-th PNG figure
        report._save = _counting(n, report._save)
    elif point == "html":
        report_html.write_html_report = _counting(n, report_html.write_html_report)
    else:
        raise SystemExit(f"unknown kill point {point!r}")


if __name__ == "__main__":
    import pmap.pipeline
    import pmap.results

    pmap.results.WRITE_BLOCK_BYTES = 1
    # a memory model scaled down so that --memory-limit 300MB gives the stored 8 x 8 chunks
    # (many blocks on a small cube) and 4GB one chunk: a resume under another limit must
    # keep the recorded grid
    pmap.pipeline.MIN_CHUNK_MIB = 0.02
    pmap.pipeline.CHUNK_MEMORY_FACTOR = 1e6
    point, n, args = sys.argv[1], int(sys.argv[2]), sys.argv[3:]
    arm(point, n)
    from pmap import cli

    sys.exit(cli.main(args))
