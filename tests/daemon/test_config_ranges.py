"""Every detection setting is refused at load outside the range the engine works in.

An outside tester's report (D4): ``glr_window: 10`` passed ``check`` and the daemon then
dropped every sample of the stream as ``internal_error``; ``window_samples: 100000000``
passed too and ``replay`` died asking numpy for 191 GiB.  The ranges live in one place
(``shiftwatch.core.settings``): the engine's own refusal (``GlrTest.design``) reads the same
constant, so a value the configuration accepts is one the engine runs with.
"""

from __future__ import annotations

import os
from dataclasses import fields
from pathlib import Path

import numpy as np
import pytest

from shiftwatch.config import ConfigError, parse_config
from shiftwatch.core.engine import StreamEngine
from shiftwatch.core.settings import (
    CLIP_SIGMA_MAX,
    CONFIRM_MAX_SAMPLES_MAX,
    GLR_WINDOW_RANGE,
    MIN_SIGMA_HIGHEST,
    MIN_SIGMA_LOWEST,
    SPIKE_SIGMA_MAX,
    TEST_NAMES,
    WINDOW_SAMPLES_MAX,
    DetectionSettings,
)

#: Values outside each setting's range, written as YAML.  Every field of DetectionSettings
#: must be here (checked below), so a new setting cannot skip the walk.
OUT_OF_RANGE: dict[str, list[str]] = {
    "min_shift_sigma": ["0", "-1", "4.5", ".inf", ".nan", "'big'"],
    # 10**302 weeks (6e307 s, written out: a duration takes no exponent) passed and the
    # engine's repeat check then raised on every batch ("math domain error"): held to
    # FALSE_ALARM_EVERY_MAX (1,000 years).
    "false_alarm_every": ["0s", "-5s", "'soon'", "1.0e+302w", f"{10**302}w", "52200w"],
    "test": ["ewma", "5"],
    "warmup_samples": ["0", "19", "2.5", "true"],
    "window_samples": ["0", "39", str(WINDOW_SAMPLES_MAX + 1), "100000000"],
    "clip_sigma": ["0", "-2", str(CLIP_SIGMA_MAX * 2), "1.0e+300"],
    "spike_sigma": ["0", str(SPIKE_SIGMA_MAX * 2), "1.0e+300"],
    "interval_level": ["0.4", "1.0", "2"],
    "confirm_precision": ["0", "-1"],
    "confirm_min_samples": ["0", str(CONFIRM_MAX_SAMPLES_MAX + 1)],
    "confirm_max_samples": ["0", str(CONFIRM_MAX_SAMPLES_MAX + 1)],
    "confirm_p_value": ["0", "0.5", "-0.1"],
    "min_sigma": ["0", "1.0e-300", "1.0e+300", "-1.0"],
    "glr_window": ["1", "10", str(GLR_WINDOW_RANGE[0] - 1), str(GLR_WINDOW_RANGE[1] + 1)],
    "baseline_memory": ["0", "-3"],
    "baseline_guard": ["0", "100000"],
    "max_time_ahead": ["0s", "-1s"],
    "max_time_behind": ["0s", "'never'"],
}


def test_the_walk_covers_every_detection_setting() -> None:
    assert set(OUT_OF_RANGE) == {f.name for f in fields(DetectionSettings)}


@pytest.mark.parametrize("key, value", [(k, v) for k, vs in OUT_OF_RANGE.items() for v in vs])
def test_an_out_of_range_setting_is_refused_at_load_naming_file_line_and_key(key: str, value: str) -> None:
    for text, line, path in (
        (f"streams: [{{topic: a/b}}]\ndetection:\n  {key}: {value}\n", 3, f"detection.{key}"),
        (f"streams:\n  - topic: a/+\n    detection:\n      test: glr\n      {key}: {value}\n", 5,
         f"streams[0].detection.{key}"),
    ):
        with pytest.raises(ConfigError) as exc:
            parse_config(text, file="plant.yaml")
        assert exc.value.file == "plant.yaml" and exc.value.line == line, str(exc.value)
        assert exc.value.key_path == path, str(exc.value)
        assert str(exc.value).startswith(f"plant.yaml:{line}: "), str(exc.value)


#: The edges of each range the configuration accepts, with every test: the engine must run
#: with them (the tester's values failed in the engine, not at load).
EDGES: list[dict[str, object]] = [
    {"glr_window": GLR_WINDOW_RANGE[0]}, {"glr_window": GLR_WINDOW_RANGE[1]},
    {"window_samples": WINDOW_SAMPLES_MAX, "warmup_samples": WINDOW_SAMPLES_MAX // 2},
    {"window_samples": 40, "warmup_samples": 20, "baseline_guard": 19},
    {"clip_sigma": CLIP_SIGMA_MAX, "spike_sigma": SPIKE_SIGMA_MAX},
    {"min_sigma": MIN_SIGMA_LOWEST}, {"min_sigma": MIN_SIGMA_HIGHEST},
    {"confirm_max_samples": CONFIRM_MAX_SAMPLES_MAX, "confirm_min_samples": CONFIRM_MAX_SAMPLES_MAX},
    {"min_shift_sigma": 4.0}, {"false_alarm_every": "1ms"}, {"false_alarm_every": "52000w"},
]


@pytest.mark.parametrize("test", TEST_NAMES)
@pytest.mark.parametrize("edge", EDGES, ids=lambda e: ",".join(f"{k}={v}" for k, v in e.items()))
def test_the_engine_runs_at_the_edges_the_configuration_accepts(test: str, edge: dict[str, object]) -> None:
    # Floats written with a dot: YAML 1.1 reads 1e-100 without one as text (see test_config.py).
    body = "".join(f"  {k}: {v:.6e}\n" if isinstance(v, float) else f"  {k}: {v}\n" for k, v in edge.items())
    spec = parse_config(f"detection:\n  test: {test}\n{body}", file="plant.yaml").detection
    rng = np.random.default_rng(7)
    n = 1500
    t = 1.7e9 + np.arange(n, dtype=float)
    scale = float(edge.get("min_sigma", 1.0))  # type: ignore[arg-type]  # noise at the floor
    v = scale * (10.0 + rng.standard_normal(n))
    v[900:] += 5.0 * scale  # a step of 5 sigma: every design here detects it
    res = StreamEngine("brackenfield/line2/filler/head1/fill", spec).process(t, v)
    assert res.records, "the engine made no record of a 4-sigma step"
    assert any(r.phase == "detected" for r in res.records)


def _write(tmp_path: Path, name: str, text: str) -> Path:
    p = tmp_path / name
    p.write_text(text)
    os.chmod(p, 0o600)
    return p


def test_check_refuses_the_testers_glr_window_and_replay_gives_no_traceback(cli, tmp_path: Path) -> None:
    cfg = _write(tmp_path, "e.yaml", 'broker: {url: "mqtt://127.0.0.1:18831", client_id: sw-e}\n'
                 "streams:\n"
                 '  - {topic: "e/glr/+", format: number, detection: {test: glr, glr_window: 10}}\n'
                 'metrics: {listen: "127.0.0.1:19653"}\n'
                 f"state: {{dir: {tmp_path / 'estate'}}}\n")
    res = cli("check", "--config", str(cfg), "--no-network")
    assert res.returncode == 2, res.stdout + res.stderr
    assert (f"{cfg}:3: the 1st stream (streams[0]): detection.glr_window: must be a whole number "
            "from 50 to 2000") in res.stderr
    data = _write(tmp_path, "some.csv", "time,stream,value\n"
                  + "".join(f"2026-03-02T06:{i // 60:02d}:{i % 60:02d}Z,a/b,{10 + (i % 7) * 0.1}\n"
                            for i in range(300)))
    for detection in ("{glr_window: 1, test: glr}", "{window_samples: 100000000}"):
        g = _write(tmp_path, "g.yaml", f"streams: [{{topic: a/b}}]\ndetection: {detection}\n")
        res = cli("replay", "--config", str(g), str(data))
        assert res.returncode == 2, res.stderr
        assert f"{g}:2: detection." in res.stderr
        assert "Traceback" not in res.stderr and "MemoryError" not in res.stderr
