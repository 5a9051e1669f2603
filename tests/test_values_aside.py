"""The file's values held without the density matrix's columns through the fit
(core.prepare_file.ValuesAside, used by core.analysis.analyse).

Reference: the values computed directly (core.file_values.compensated_and_transformed,
the one compensate-and-transform step): rebuilding must give them back bit for bit,
on fcsparser's bundled integer files (jittered channels: their matrix columns are not
the values) and on a demo tube, with events set aside and in either memory order.
"""

import glob
import os

import numpy as np
import pytest

from core.analysis import analyse, compensated_and_transformed, density_input
from core.fcs import read_fcs
from core.prepare_file import ValuesAside
from core.recipe import default_recipe

from .bundled_files import bundled
from .test_analysis import make_file, recipe

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
INTEGER = [f for f in bundled() if f["datatype"] == "I" and f["events"] <= 100_000]
INTEGER_FILES = [f["path"] for f in INTEGER]
DEMO = sorted(glob.glob(os.path.join(ROOT, "sample_events", "*.fcs")))[:1]
IDS = [f"FCS {f['version']} integer, {f['events']} events x {f['channels']}" for f in INTEGER] + ["demo tube A"]


@pytest.mark.parametrize("path", INTEGER_FILES + DEMO, ids=IDS)
def test_values_rebuilt_from_the_matrix_equal_the_values(path):
    ef = read_fcs(path)
    recipe = default_recipe(ef)
    prepared, values = density_input(ef, recipe)
    aside = ValuesAside(values, prepared)
    assert np.array_equal(aside.restore(prepared.matrix), values, equal_nan=True)
    # the same in column-major order (the app's layout)
    F = np.asfortranarray(values)
    back = ValuesAside(F, prepared).restore(prepared.matrix)
    assert back.flags.f_contiguous and np.array_equal(back, values, equal_nan=True)
    # what is held aside is smaller than the values when the matrix has copied columns
    if prepared.from_values:
        held = aside.other.nbytes + aside.removed.nbytes
        assert held < values.nbytes


def test_the_files_cover_jittered_columns_and_events_set_aside():
    jittered = removed = 0
    for path in INTEGER_FILES:
        ef = read_fcs(path)
        prepared, _ = density_input(ef, default_recipe(ef))
        jittered += len(prepared.from_values) < prepared.matrix.shape[1]
        removed += int((~prepared.kept).any())
    assert jittered >= 1 and removed >= 1


def test_analyse_values_are_the_compensated_and_transformed_values(tmp_path):
    # integer values (jittered), spillover mixing the density channels, saturated events set aside
    path = tmp_path / "tube.fcs"
    make_file(path)
    ef, r = read_fcs(path), recipe()
    a = analyse(ef, r)
    assert (~a.kept).any() and len(a.prepared.from_values) < a.prepared.matrix.shape[1]
    assert np.array_equal(a.values, compensated_and_transformed(ef, r)[1], equal_nan=True)


def _resident_mb() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2 ** 20


@pytest.mark.skipif(not os.path.exists("/proc/self/statm"), reason="reads /proc")
def test_freed_heap_memory_goes_back_to_the_system():
    # glibc keeps freed heap blocks resident until the heap is trimmed (malloc_trim(3),
    # from memory); blocks of 64 KiB come from the heap, and one block allocated after
    # them keeps the heap's top in use, so freeing the others returns nothing by itself
    from core.prepare_file import return_freed_memory

    if not return_freed_memory():
        pytest.skip("the C library has no malloc_trim")
    blocks = [np.ones(8192) for _ in range(1600)]   # 1,600 x 64 KiB = 100 MiB, pages touched
    pin = np.ones(8192)
    held = _resident_mb()
    del blocks
    before = _resident_mb()
    if held - before > 50:
        pytest.skip("this allocator returned the freed blocks by itself (e.g. a lowered mmap threshold)")
    assert return_freed_memory()
    after = _resident_mb()
    assert before - after > 50, (before, after)
    del pin
