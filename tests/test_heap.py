"""Memory handed back during a night run: the allocator's free pages, and the per-set-up caches.

What is checked against something outside the project: the operating system's own count of the
process's resident memory (``VmRSS`` in ``/proc/self/status``, Linux proc(5)); the rest checks that
dropping the caches changes no result.
"""

import functools
import gc
import math
import sys
from pathlib import Path

import numpy as np
import pytest

import specan.pipeline as pipeline
from specan import contents
from specan.night import heap
from specan.parameters import default_model
from specan.velocity import bank

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_spectra" / "trf3_01.fits"


def _resident_mb():
    # proc(5): VmRSS, the resident set size, in kB
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    raise AssertionError("no VmRSS line in /proc/self/status")


@pytest.mark.skipif(not sys.platform.startswith("linux") or heap._trim() is None,
                    reason="malloc_trim is glibc's (Linux): elsewhere give_back only collects")
def test_give_back_returns_freed_pages_to_the_system():
    # 200 MB in 2,000-byte blocks (above pymalloc's 512 bytes: the C library's malloc), one in
    # ten kept, so the freed memory sits between live blocks and the heap's top cannot shrink.
    blocks = [bytes(2000) for _ in range(100_000)]
    kept = blocks[::10]
    del blocks
    before = _resident_mb()
    assert heap.give_back() is True
    after = _resident_mb()
    assert len(kept) == 10_000
    # 180 MB are free; the pages wholly inside the free runs (~4 of each ~18 KB run) go back
    assert before - after > 60, f"{before:.0f} MB resident before, {after:.0f} after"


@pytest.mark.skipif(not sys.platform.startswith("linux") or heap._trim() is None,
                    reason="malloc_trim is glibc's (Linux): elsewhere give_back only collects")
def test_give_back_without_the_collection_still_returns_pages(monkeypatch):
    # The run's hand-back after finding its inputs skips the full collection (strings and
    # lists hold no cycles; the collection took ~0.1 s there): the pages must still go back.
    blocks = [bytes(2000) for _ in range(50_000)]
    kept = blocks[::10]
    del blocks
    before = _resident_mb()
    monkeypatch.setattr(heap.gc, "collect", lambda *a: pytest.fail("collect=False must not collect"))
    assert heap.give_back(collect=False) is True
    assert len(kept) == 5_000 and before - _resident_mb() > 30


def test_give_back_every_counts_across_calls(monkeypatch):
    calls = []
    monkeypatch.setattr(heap, "give_back", lambda: calls.append(1) or True)
    counter = heap.GiveBackEvery(every=5)
    for n in (1, 1, 1, 1):        # 4: not yet
        counter.add(n)
    assert calls == []
    counter.add(3)                # 7: the fifth passed
    assert len(calls) == 1
    counter.add(2)                # 9
    assert len(calls) == 1
    counter.add(12)               # 21: past 10, 15 and 20, one hand-back is enough
    assert len(calls) == 2


class _Node:
    def __init__(self):
        self.me = self    # a reference cycle: only the cyclic collector frees it


def _cycles_freed():
    # gc.collect returns the number of unreachable objects it found (Python's gc module)
    return gc.collect()


def test_long_lived_set_aside_freezes_then_gives_back_and_frees_what_dies():
    assert gc.get_freeze_count() == 0
    garbage = _Node()
    del garbage                           # unreachable before the block: collected, not set aside
    with heap.long_lived_set_aside():
        frozen = gc.get_freeze_count()
        assert frozen > 1000              # the imported modules' objects (Python's gc.freeze count)
        kept = _Node()                    # alive at the start of no block: the collector's as ever
        del kept
        assert _cycles_freed() >= 1
        with heap.long_lived_set_aside():         # an inner block changes nothing
            assert gc.get_freeze_count() == frozen
        assert gc.get_freeze_count() == frozen
    assert gc.get_freeze_count() == 0     # all back in the collector's care


def test_held_aside_keeps_objects_set_aside_until_its_own_end():
    assert gc.get_freeze_count() == 0
    with heap.held_aside():
        with heap.long_lived_set_aside():
            frozen = gc.get_freeze_count()
            assert frozen > 1000
        # still aside after the set-aside's own block (the count only loses the few set-aside objects
        # that died since, such as the block's own generator)
        assert gc.get_freeze_count() > frozen - 100
        with heap.held_aside():                   # an inner hold hands its ending to the outer one
            pass
        assert gc.get_freeze_count() > frozen - 100
    assert gc.get_freeze_count() == 0             # back when the hold ends
    with heap.held_aside():                       # nothing set aside inside: nothing to give back
        assert gc.get_freeze_count() == 0
    with pytest.raises(RuntimeError), heap.held_aside(), heap.long_lived_set_aside():
        raise RuntimeError("a failure inside")
    assert gc.get_freeze_count() == 0


def test_night_run_leaves_nothing_set_aside(tmp_path):
    # the run holds the libraries' objects aside through its writing (heap.held_aside), then gives them back
    pipeline.run([str(SAMPLE)], tmp_path / "out", plots="none", progress=False)
    assert gc.get_freeze_count() == 0


def test_collector_paused_restores_the_collector_as_it_was():
    assert gc.isenabled()
    with heap.collector_paused():
        assert not gc.isenabled()
    assert gc.isenabled()
    gc.disable()
    try:
        with heap.collector_paused():
            assert not gc.isenabled()
        assert not gc.isenabled()         # it was off before: left off
    finally:
        gc.enable()
    with pytest.raises(RuntimeError), heap.collector_paused():
        raise RuntimeError("a failure inside")
    assert gc.isenabled()


def test_forgettable_registers_dicts_and_lru_caches():
    store = contents.forgettable({})

    @contents.forgettable
    @functools.lru_cache(maxsize=4)
    def square(x):
        return x * x

    store["a"] = np.ones(3)
    square(3)
    assert square.cache_info().currsize == 1
    contents.forget_setups()
    assert store == {}
    assert square.cache_info().currsize == 0
    assert square(4) == 16    # made again when next needed


def test_forgetting_the_setups_changes_no_result():
    first = pipeline.analyse_file(str(SAMPLE))
    assert bank._bank.cache_info().currsize > 0      # the velocity templates' bank was kept
    assert default_model.cache_info().currsize == 1
    contents.forget_setups()
    assert bank._bank.cache_info().currsize == 0
    assert default_model.cache_info().currsize == 0
    again = pipeline.analyse_file(str(SAMPLE))
    a, b = first["values"], again["values"]
    assert a.keys() == b.keys()
    differing = [k for k in a if a[k] != b[k] and not (isinstance(a[k], float) and math.isnan(a[k])
                                                       and isinstance(b[k], float) and math.isnan(b[k]))]
    assert differing == []


def test_night_run_drops_the_setups_before_writing(tmp_path):
    pipeline.run([str(SAMPLE)], tmp_path / "out", plots="none", progress=False)
    assert bank._bank.cache_info().currsize == 0
    assert default_model.cache_info().currsize == 0
    assert (tmp_path / "out" / "catalogue.ecsv").is_file()


def test_command_line_sets_objects_aside_at_exit():
    # The command line registers gc.freeze to run at exit (heap.set_aside_at_exit): the interpreter's
    # finalisation then does not visit every library object (0.8-0.9 s of a night run's exit, measured
    # in benchmarks, not here). Run in a fresh process: the exit handlers are run by hand, as at exit.
    import subprocess

    script = ("import atexit, gc\n"
              "from specan.cli import main\n"
              "assert main(['--version']) == 0\n"
              "assert gc.get_freeze_count() == 0\n"
              "atexit._run_exitfuncs()\n"
              "print(gc.get_freeze_count())\n")
    res = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert int(res.stdout.split()[-1]) > 1000


def test_set_aside_at_exit_registers_once(monkeypatch):
    registered = []
    monkeypatch.setattr(heap, "_AT_EXIT", [])
    monkeypatch.setattr(heap.atexit, "register", registered.append)
    heap.set_aside_at_exit()
    heap.set_aside_at_exit()
    assert registered == [gc.freeze]
