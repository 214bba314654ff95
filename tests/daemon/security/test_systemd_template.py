"""The systemd template unit for shards (systemd/shiftwatch@.service): as hardened as the
single unit, clean under ``systemd-analyze verify`` for an instance, and passing its
instance to ``run --shard`` (systemd.unit(5): ``%i`` is the instance name)."""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

from .test_systemd_unit import ROOT, UNIT, exposure, need, service_settings

TEMPLATE = ROOT / "systemd" / "shiftwatch@.service"


def test_the_template_is_rated_as_the_single_unit(tmp_path: Path) -> None:
    instance = tmp_path / "shiftwatch@2.service"
    instance.write_text(TEMPLATE.read_text())
    assert exposure(instance) <= 1.5


def test_the_template_differs_from_the_unit_only_where_shards_need_it() -> None:
    one = dict(service_settings(UNIT.read_text()))
    many = dict(service_settings(TEMPLATE.read_text()))
    changed = {k for k in one.keys() | many.keys() if one.get(k) != many.get(k)}
    assert changed == {"ExecStart", "StateDirectory"}, changed
    assert many["ExecStart"].endswith("--shard %i")
    assert many["StateDirectory"] == "shiftwatch/shard-%i"
    assert many["Restart"] == "on-failure"  # a shard that lost its lease (status 3) comes back


def test_an_instance_of_the_template_verifies_clean(tmp_path: Path, shiftwatch_cmd: list[str]) -> None:
    exe = Path(shiftwatch_cmd[0])
    assert exe.is_absolute() and os.access(exe, os.X_OK), shiftwatch_cmd
    copy = tmp_path / "shiftwatch@1.service"
    copy.write_text(TEMPLATE.read_text().replace("ExecStart=/opt/shiftwatch/.venv/bin/shiftwatch",
                                                 f"ExecStart={exe}"))
    res = subprocess.run([need("systemd-analyze"), "verify", str(copy)], capture_output=True,
                         check=False, text=True, timeout=60)
    assert res.returncode == 0 and res.stdout + res.stderr == "", res.stdout + res.stderr
