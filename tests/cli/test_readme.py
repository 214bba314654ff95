"""The README against the code: the two set-up commands CI runs, the caution every record
carries, the unit's Documentation= path, the links inside the README, and the repository's
top level."""

from __future__ import annotations

import re
from pathlib import Path

from shiftwatch.core.records import ADVISORY

ROOT = Path(__file__).resolve().parents[2]
README = (ROOT / "README.md").read_text()


def section(title: str) -> str:
    return README.split(f"\n## {title}\n", 1)[1].split("\n## ", 1)[0]


def test_quick_start_is_two_commands_and_ci_runs_the_second_and_nothing_else() -> None:
    blocks = re.findall(r"```sh\n(.*?)```", section("Quick start"), re.DOTALL)
    commands = [line for b in blocks for line in b.splitlines() if line.strip()]
    assert len(commands) == 2, commands
    assert commands[0].endswith("shiftwatch demo") and "pip install" in commands[0]
    assert commands[1] == "sh tests/install-and-test.sh"
    ci = [line for line in (ROOT / ".ci" / "run").read_text().splitlines()
          if line.strip() and not line.startswith("#")]
    assert ci[-1] == "exec " + commands[1]
    assert all(line.startswith(("set ", "cd ")) for line in ci[:-1]), ci  # nothing else runs
    script = (ROOT / "tests" / "install-and-test.sh").read_text()
    # sudo only when not root and only where it exists; the whole suite at the end.
    assert 'if [ "$(id -u)" -eq 0 ]' in script and "command -v sudo" in script
    assert script.rstrip().endswith('exec python -m pytest -n "${SHIFTWATCH_TEST_WORKERS:-3}" --dist loadfile '
                                   '--no-loadscope-reorder "$@"')


def test_the_record_example_carries_the_advisory_the_engine_writes() -> None:
    assert f'"advisory": "{ADVISORY}"' in README
    for words in ("safety instrumented system", "local codes and licensed practice"):
        assert words in ADVISORY and words in " ".join(section("Cautions").split())


def test_the_units_documentation_path_is_where_the_install_steps_put_the_readme() -> None:
    unit = (ROOT / "systemd" / "shiftwatch.service").read_text()
    doc = re.search(r"^Documentation=file://(\S+)$", unit, re.MULTILINE)
    assert doc is not None
    assert re.search(rf"install -m 0644 \S*README\.md {re.escape(doc.group(1))}", section("For installers"))


def test_every_link_inside_the_readme_leads_to_a_heading() -> None:
    # GitHub's anchors: lower case, punctuation other than - and _ dropped, spaces as -.
    anchors = {re.sub(r"[^\w\- ]", "", h.strip().lower()).replace(" ", "-")
               for h in re.findall(r"^#+ (.+)$", README, re.MULTILINE)}
    links = set(re.findall(r"\]\(#([^)]+)\)", README))
    assert links and links <= anchors, links - anchors


def test_the_top_level_holds_only_what_it_should() -> None:
    allowed = {"README.md", "DEVELOPERS.md", "pyproject.toml", "daemon", "tests", "config", "systemd"}
    here = {p.name for p in ROOT.iterdir() if not p.name.startswith(".")}
    assert here <= allowed | {"build", "dist"}, here - allowed  # build/dist: git-ignored pip output
