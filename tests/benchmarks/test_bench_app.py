"""Benchmark: how fast the page re-renders after a control moves on the depth and channels views.

Run with ``python3 -m pytest tests/benchmarks/test_bench_app.py -m benchmark -s -p no:cacheprovider``.
Each view is warmed up first (imports, the first model run, the first figure), then
one control is moved to a new value (a cache miss: the model and the figure are
computed; a probe's peak recomputes that probe, the irradiance every probe, the SBR
threshold only the figure) and back to the first value (a cache hit).  Times are printed
beside the target; only a loose sanity bound is asserted, since the machine is shared.
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest

pytest.importorskip("streamlit")
from streamlit.testing.v1 import AppTest  # noqa: E402

APP = Path(__file__).resolve().parents[2] / "app" / "main.py"
#: Target re-render time after moving a control that recomputes (s).
TARGET_RERENDER_S = 0.3
#: Sanity bound: far beyond the target means the caching is broken, not a slow machine.
_SANITY_S = 10.0


def _timed(step) -> float:
    t0 = time.perf_counter()
    step()
    return time.perf_counter() - t0


def _measure(view: str, key: str, kind: str, new_value, old_value) -> dict[str, float]:
    at = AppTest.from_file(str(APP), default_timeout=120)
    at.run()
    if view != "depth":
        at.switch_page(f"view_{view}.py").run()
    widget = getattr(at, kind)(key=key)
    warm = _timed(lambda: widget.set_value(new_value).run())  # warm-up: first model run at the new value
    _timed(lambda: getattr(at, kind)(key=key).set_value(old_value).run())
    assert not at.exception
    # a third value that has never been computed: model + figure (cache miss)
    miss = _timed(lambda: getattr(at, kind)(key=key).set_value(new_value + (new_value - old_value) / 2).run())
    hit = _timed(lambda: getattr(at, kind)(key=key).set_value(old_value).run())
    assert not at.exception and not at.error
    return {"warm-up": warm, "moved (computed)": miss, "moved back (cached)": hit}


@pytest.mark.benchmark
def test_rerender_after_moving_a_control():
    results = {
        "depth: probe 1 peak": _measure("depth", "w_peak_0", "number_input", 710.0, 700.0),
        "depth: irradiance": _measure("depth", "w_irradiance", "number_input", 12.0, 10.0),
        "depth: SBR threshold": _measure("depth", "w_sbr_threshold", "slider", 2.5, 2.0),
        "channels: probe 2 peak": _measure("channels", "w_peak_1", "number_input", 790.0, 780.0),
    }
    print(f"\npage re-render after moving a control (target < {TARGET_RERENDER_S} s)")
    for name, times in results.items():
        cells = "  ".join(f"{k} {v:.3f} s ({v / TARGET_RERENDER_S:.2f} x target)" for k, v in times.items())
        print(f"  {name:24s} {cells}")
    for times in results.values():
        assert times["moved back (cached)"] < _SANITY_S
        assert times["moved (computed)"] < _SANITY_S
