"""End-to-end smoke test of the pipeline on a small synthetic study."""

import numpy as np

import glmeeg
from glmeeg.testing import write_study


def test_planted_effect_found_and_saved(tmp_path):
    design = write_study(tmp_path / "s", effect=2.0, seed=3, n_subjects=12)
    run = glmeeg.run_analysis(design)
    t = run.test("b-vs-a")
    sig = t.map("significant")
    # The effect is planted at channel 1, samples 2-4 only (see glmeeg.testing.write_study).
    assert sig[1, 2:5].all()
    assert not sig[[0, 2, 3]].any()
    out = glmeeg.write_run(run, tmp_path / "out")
    back = glmeeg.load_result(out / "b-vs-a")
    np.testing.assert_array_equal(back.statistic, t.statistic)


def test_big_endian_and_float64_arrays_give_the_same_result(tmp_path):
    # Arrays written on a big-endian machine hold the same numbers; byte order must not matter.
    design = write_study(tmp_path / "s", effect=2.0, seed=4, n_subjects=10, dtype=np.float64)
    native = glmeeg.run_analysis(design).test("b-vs-a")
    for f in (tmp_path / "s" / "epochs").glob("*.npy"):
        np.save(f, np.load(f).astype(">f8"))
    swapped = glmeeg.run_analysis(design).test("b-vs-a")
    np.testing.assert_array_equal(swapped.statistic, native.statistic)
