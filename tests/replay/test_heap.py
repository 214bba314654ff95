"""The heap settings of a streaming command (shiftwatch.heap).

Reference: glibc's mallopt(3) manual page: a block at least M_MMAP_THRESHOLD long is
served by mmap and unmapped when freed; M_TRIM_THRESHOLD is the free memory at the top of
the heap kept before it is given back.  A page given back and taken again is a minor page
fault when it is first written (getrusage(2), ru_minflt), so the count of those faults tells
whether freed pages were reused.  The probe turns transparent huge pages off for itself
(prctl(2), PR_SET_THP_DISABLE) so that a fault is one 4 KB page on any host's THP setting.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap

PROBE = textwrap.dedent("""
    import ctypes, resource, sys
    ctypes.CDLL("libc.so.6").prctl(41, 1, 0, 0, 0)  # PR_SET_THP_DISABLE: 4 KB pages only
    import numpy as np
    from shiftwatch import heap
    took = heap.keep_freed_memory() if sys.argv[1] == "keep" else None
    def chunk():  # as a replay's chunks do: a few large arrays made, written and freed
        parts = [np.ones(1 << 19) for _ in range(3)]  # 4 MB each
        del parts
    for _ in range(5):
        chunk()
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(100):
        chunk()
    print(took, resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
""")


def faults(mode: str) -> tuple[str, int]:
    out = subprocess.run([sys.executable, "-c", PROBE, mode], capture_output=True, text=True, check=True,
                         timeout=120).stdout.split()
    return out[0], int(out[1])


def test_a_streaming_command_reuses_the_pages_of_the_arrays_it_frees() -> None:
    took, kept = faults("keep")
    _, plain = faults("plain")
    assert took == "True"  # glibc took both settings (this project runs on Linux with glibc)
    # Without the settings glibc raises its mmap threshold after the first free of such a block
    # (mallopt(3), "dynamic mmap threshold") and gives the heap's top back once twice that is
    # free, so pages of the arrays (1,024 pages each) are faulted in again chunk after chunk
    # (about two arrays' worth a chunk, on glibc 2.36); with them the pages are reused.
    assert kept < 1024 and plain > 100 * 1024


def test_the_replay_command_takes_the_heap_settings(tmp_path, monkeypatch) -> None:
    from shiftwatch import cli, heap

    from .history import readings, write_long

    calls: list[int] = []
    monkeypatch.setattr(heap, "keep_freed_memory", lambda *a: calls.append(1) or True)
    path = write_long(tmp_path / "line1.csv", readings(50))
    assert cli.main(["replay", "--jobs", "1", "--out", str(tmp_path / "out.jsonl"), str(path)]) == 0
    assert calls == [1]
