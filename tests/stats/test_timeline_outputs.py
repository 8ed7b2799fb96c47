"""The timeline scorer reproduces its recorded outputs on fixed seeded inputs.

``tests/stats/data/make_timeline_outputs.py`` recorded every output of ``score_timeline``
(flags, log p-values, expected, level and the warm state) for busy, quiet and Poisson
detectors, missing intervals, zero runs, repeated values, counts over capacity, level shifts
and a timeline without local days, in chunks carrying the warm state; scoring in one call must
give the same. Any change to the scorer's
arithmetic (a speed-up, a refactoring) must keep them: floats to 1e-12 relative, flags and
fixed-point integers exactly. Regenerate the file only when a change of results is intended.
"""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest

DATA = Path(__file__).parent / "data"
RTOL = 1e-12


def _maker():  # type: ignore[no-untyped-def]
    spec = importlib.util.spec_from_file_location("make_timeline_outputs",
                                                  DATA / "make_timeline_outputs.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


MAKER = _maker()


@pytest.fixture(scope="module")
def recorded() -> dict[str, np.ndarray]:
    with np.load(DATA / "timeline_outputs.npz") as f:
        return {k: f[k] for k in f.files}


def _same_state(got: dict, want: dict, where: str) -> None:  # type: ignore[type-arg]
    assert got.keys() == want.keys(), where
    for key, w in want.items():
        g = got[key]
        if isinstance(w, float):
            assert g == pytest.approx(w, rel=RTOL, abs=0.0), f"{where}: warm_state.{key}"
        else:
            assert g == w, f"{where}: warm_state.{key}"


@pytest.mark.parametrize("case", MAKER.CASES)
def test_scorer_reproduces_recorded_outputs(case: str,
                                            recorded: dict[str, np.ndarray]) -> None:
    inp = MAKER.case_inputs(case)
    chunks = MAKER.score_chunks(inp)
    for c, ev in enumerate(chunks):
        got = MAKER.flatten(f"{case}/{c}", ev)
        assert set(got) <= set(recorded), f"{case}/{c}: not recorded"
        for key, arr in got.items():
            want = recorded[key]
            if key.endswith("warm_state"):
                _same_state(json.loads(str(arr)), json.loads(str(want)), key)
            elif want.dtype == bool:
                np.testing.assert_array_equal(arr, want, err_msg=key)
            else:
                np.testing.assert_allclose(arr, want, rtol=RTOL, atol=0.0, err_msg=key)
    whole = MAKER.score_chunks(inp, bounds=(0, MAKER.CHUNKS[-1]))[0]
    np.testing.assert_array_equal(whole.expected, np.concatenate([ev.expected for ev in chunks]))
    np.testing.assert_array_equal(whole.level, np.concatenate([ev.level for ev in chunks]))
    assert whole.warm_state == chunks[-1].warm_state
    for kind in whole.flag:
        np.testing.assert_array_equal(whole.flag[kind],
                                      np.concatenate([ev.flag[kind] for ev in chunks]))
        np.testing.assert_array_equal(whole.log_p[kind],
                                      np.concatenate([ev.log_p[kind] for ev in chunks]))


def test_recorded_cases_exercise_every_test(recorded: dict[str, np.ndarray]) -> None:
    """The recorded inputs raise every kind of flag somewhere, so the check above covers all
    of the scorer's branches that set them."""
    from service.domain import KINDS

    for kind in KINDS:
        assert any(recorded[k].any() for k in recorded if k.endswith(f"/flag/{kind}")), kind
