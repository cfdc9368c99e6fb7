"""Stored trajectories: the engine's draws do not change when its code is reorganised.

Reference: the engine's own earlier output.  Each case below was run with the engine as it
stood before its event loop was split into small steps (grmc 0.1.0 development, the single
``_phase`` loop) and its result stored as the SHA-256 of every field's bytes, beside the
event count and the final state in the clear.  The same seed must give the same trajectory
bit for bit, so any change to the order of draws or of floating-point operations fails here.
The cases cover every branch of the loop: settling, an excess at t = 0, oversampled bins,
the sorting search past its first four places (19 channels), the rounding guard (rates over
20 orders of magnitude), sine and square thinning, flow recording, channels with an empty
change (contact transits) and a one-channel model with no factors.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest
from test_engine import SMALL_TOML, _model

from grmc.engine import kernels, oracle, rng
from grmc.simulate import prepare

ROOT = Path(__file__).resolve().parents[1]

#: Three trap levels (acceptor- and donor-like) and donors: 5 species, 19 channels.
THREE_LEVELS = SMALL_TOML.replace(
    "acceptors_cm3 = 1.0e17", "acceptors_cm3 = 1.0e17\ndonors_cm3 = 2.0e16").replace(
    "[light]", """[[traps]]
label = "b"
count = 3
energy_eV = -0.2
kind = "donor"
electron_capture_cm3_s = 2.0e-9
hole_capture_cm3_s = 5.0e-9
[[traps]]
label = "c"
count = 2
energy_eV = 0.3
kind = "acceptor"
electron_capture_cm3_s = 2.0e-9
hole_capture_cm3_s = 5.0e-9
[light]""")


def _scenario_model(name: str):
    p = prepare(_model((ROOT / "scenarios" / name).read_text()))
    return p.model, kernels.kernel_arrays(p.model), p.x0


def _case(name: str):
    """(arrays, keyword arguments) of one stored case."""
    if name in ("small", "small_sine_flows", "small_square"):
        m = _model(SMALL_TOML)
        arr, x0 = kernels.kernel_arrays(m), m.nearest_neutral_state([3.0, 25.0, 1.0])
        kw = {"x0": x0, "settle_s": 2e-8, "excess": [2, 2, 0], "duration_s": 1e-6,
              "n_samples": 16, "oversample": 4}
        if name == "small_sine_flows":
            kw.update(modulation=(2, kernels.SINE, 3.0e6, 0.7, 0.3),
                      flow_weight=np.arange(11) - 3)
        elif name == "small_square":
            kw.update(modulation=(7, kernels.SQUARE, 5.0e6, 1.0, 0.0))
        return arr, kw
    if name == "three_levels_flows":
        m = _model(THREE_LEVELS)
        kw = {"x0": m.nearest_neutral_state([3.0, 20.0, 1.0, 2.0, 1.0]), "settle_s": 1e-8,
              "excess": [2, 2, 0, 0, 0], "duration_s": 5e-6, "n_samples": 16,
              "oversample": 2, "flow_weight": m.stoich[:, 0]}
        return kernels.kernel_arrays(m), kw
    if name == "dark_guard":
        m = _model(SMALL_TOML.replace("generation_cm3_s = 1.0e24", "generation_cm3_s = 0.0"))
        kw = {"x0": m.nearest_neutral_state([0.0, 22.0, 0.0]), "duration_s": 100.0,
              "n_samples": 16, "oversample": 2}
        return kernels.kernel_arrays(m), kw
    if name == "junction_events":
        m, arr, x0 = _scenario_model("photodiode_junction.toml")
        return arr, {"x0": x0, "settle_s": 1e-7, "duration_s": 2e-6, "n_samples": 32,
                     "oversample": 8, "flow_weight": m.flow_weight}
    if name == "chopped_pixel":
        m, arr, x0 = _scenario_model("pixel_modulated.toml")
        opt = m.channel_names.index("optical generation")
        return arr, {"x0": x0, "settle_s": 2e-7, "duration_s": 2e-6, "n_samples": 8,
                     "oversample": 8, "modulation": (opt, kernels.SQUARE, 1.0e5, 1.0, 0.0)}
    if name == "generation_only":
        arr = (np.array([[1, 1]]), np.array([1.0e8]), np.full((1, 3), -1), np.zeros((1, 3)),
               np.ones((1, 3)), np.array([0, 0]), np.array([], dtype=np.int64))
        return arr, {"x0": [0, 0], "duration_s": 1e-6, "n_samples": 10, "oversample": 3}
    raise KeyError(name)


def _digest(r: kernels.TrajectoryResult) -> str:
    h = hashlib.sha256()
    for field in r._fields:
        h.update(field.encode())
        h.update(np.ascontiguousarray(np.asarray(getattr(r, field))).tobytes())
    return h.hexdigest()


#: name -> (n_events, final state, SHA-256 of all fields), from the engine before the split.
STORED = {
    'small': (615, [0, 22, 0],
        '08e0c0940d1313d2dbdfbdeeae381799d4f221bcebb6c27632d4b6b2c368f3ea'),
    'small_sine_flows': (707, [1, 23, 0],
        '12434241be8124c72684b2f7a715eee59384bd1a736196370d0917a6d0855996'),
    'small_square': (550, [20, 42, 0],
        'ef7f0f81b514e0ed3cf66fc4e8c47bf10c6711422e808d7b0287905a5481056a'),
    'three_levels_flows': (3135, [1, 16, 0, 0, 0],
        '376673fceb0486cbe6414a4c29f132ccc0809d73493a76607dc6a8e1940d42c6'),
    'dark_guard': (2208, [0, 22, 0],
        'e0232b21911152f67206ff9600f235e228a968dfb1ad9049d362cf5b8ac36aad'),
    'junction_events': (74, [4, 204, 0],
        'e16179cc48a3be212b2eaefaba1d4c1cf78a8a872a952ed1315c57475cefe08c'),
    'chopped_pixel': (218, [38, 141, 3],
        '532946a2c7d4f8cb2cc2385978566c11d30b6d221d74ed00e382151fa815dd9a'),
    'generation_only': (105, [105, 105],
        'b0ac7a46cc81793cbc95c77175b50342b08d1102364432ea9341580ee00bc6ba'),
}


@pytest.mark.parametrize("engine", [kernels, oracle], ids=["kernel", "oracle"])
@pytest.mark.parametrize("name", sorted(STORED))
def test_stored_trajectory_is_reproduced(name, engine):
    """Same seed, same trajectory, bit for bit (reference: the stored run, module notes)."""
    arr, kw = _case(name)
    r = engine.simulate(*arr, rng_state=rng.stream_state(31, 7), **kw)
    n_events, final, digest = STORED[name]
    assert r.n_events == n_events and r.final.tolist() == final
    assert _digest(r) == digest


if __name__ == "__main__":  # prints the table above from the current engine
    for case in ("small", "small_sine_flows", "small_square", "three_levels_flows",
                 "dark_guard", "junction_events", "chopped_pixel", "generation_only"):
        a, k = _case(case)
        res = kernels.simulate(*a, rng_state=rng.stream_state(31, 7), **k)
        assert _digest(res) == _digest(oracle.simulate(*a, rng_state=rng.stream_state(31, 7),
                                                       **k))
        print(f"    {case!r}: ({res.n_events}, {res.final.tolist()},\n"
              f"        {_digest(res)!r}),")
