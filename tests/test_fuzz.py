"""Bad input through the command line, every command and every option (issue: no crash, no
traceback, nothing lost).

The cases (``tests/fuzz_cases.py``) are enumerated, then hypothesis draws more numbers and
words for every numeric and choice option.  Each bad case must end with exit code 2, one to
four lines on stderr (click's own usage error takes four), no traceback and nothing written;
each valid value drawn for a quick command must not crash either.  A few cases run in a real
process as well, where a crash of compiled code would kill it with a signal.  The suite prints
how many cases it tried and how many passed.
"""
from __future__ import annotations

import subprocess
import sys

import pytest
from fuzz_cases import _with, build, cases, commands
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from hybrid.cli import app

TALLY = {"tried": 0, "passed": 0}


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    return build(tmp_path_factory.mktemp("fuzz"))


def _leftovers(folder):
    return sorted(p.name for p in folder.iterdir())


def check(args, expect, out):
    """``None`` when the case behaved, else what went wrong."""
    done = CliRunner().invoke(app, args)
    text = (done.stdout or "") + (done.stderr or "")
    left = _leftovers(out)
    for p in out.iterdir():         # a clean folder for the next case
        if p.is_file():
            p.unlink()
    if "Traceback" in text or (done.exception and not isinstance(done.exception, SystemExit)):
        return f"crashed: {done.exception!r}"
    if expect == "valid":
        return None if done.exit_code in (0, 2) else f"exit {done.exit_code}"
    if done.exit_code != 2:
        return f"exit {done.exit_code} (want 2): {text[-200:]!r}"
    lines = [line for line in (done.stderr or "").splitlines() if line.strip()]
    if not 1 <= len(lines) <= 4:
        return f"{len(lines)} lines on stderr: {done.stderr[-300:]!r}"
    if left:
        return f"left files behind: {left}"
    return None


def test_every_command_refuses_bad_input_cleanly(files, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    failures, tried = [], 0
    for label, args, expect, _ in cases(files, out):
        tried += 1
        problem = check(args, expect, out)
        if problem:
            failures.append(f"{label}: {problem}")
    TALLY["tried"] += tried
    TALLY["passed"] += tried - len(failures)
    print(f"\nfuzz (enumerated): {tried} cases tried, {tried - len(failures)} passed")
    assert not failures, "\n".join(f[:300] for f in failures[:60])


WORDS = st.one_of(st.integers(-10 ** 30, 10 ** 30).map(str), st.floats(allow_nan=True, allow_infinity=True).map(repr),
                  st.text(st.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=6))


@given(data=st.data())
@settings(max_examples=2500, deadline=None, suppress_health_check=list(HealthCheck))
def test_drawn_values_for_every_option(files, tmp_path_factory, data):
    out = tmp_path_factory.getbasetemp() / "drawn-out"
    out.mkdir(exist_ok=True)
    cmd = data.draw(st.sampled_from(commands(files, out)))
    if not cmd.options:
        return
    option = data.draw(st.sampled_from(sorted(cmd.options)))
    value = data.draw(WORDS)
    valid = cmd.options[option](value)
    if valid and not cmd.cheap:
        return
    TALLY["tried"] += 1
    problem = check(_with(cmd.base(), option, value), "valid" if valid else "bad", out)
    assert problem is None, f"{cmd.name} {option} {value!r}: {problem}"
    TALLY["passed"] += 1


@pytest.mark.parametrize("args", [
    ["plan", "{model}", "--k", "0", "--out", "{out}/p.csv"],
    ["plan", "{model}", "--k", "99999999999999999999", "--out", "{out}/p.csv"],
    ["plan", "{model}", "--k", "39", "--budget", "10", "--out", "{out}/p.csv"],
    ["plan", "{model}", "--target", "1e-300", "--budget", "10", "--out", "{out}/p.csv"],
    ["related", "{model}", "L0001", "--k", "0"],
    ["related", "{model}", "L0001", "--k", "39"],
    ["score", "{model}", "{new_lots}", "--audience", "0", "--neighbours", "0", "--chunk", "1", "--out", "{out}/s.csv"],
])
def test_compiled_code_survives_in_a_real_process(files, tmp_path, args):
    # a crash of compiled code kills the process with a signal (negative code, 134 or 139)
    args = [a.format(model=files["model"], new_lots=files["new_lots"], out=tmp_path) for a in args]
    done = subprocess.run([sys.executable, "-m", "hybrid", *args], capture_output=True, text=True, timeout=300)
    assert done.returncode in (0, 2), (done.returncode, done.stderr[-500:])
    assert "Traceback" not in done.stderr


def test_the_suite_tried_thousands_of_cases():
    # runs last in this module (tests/conftest.py prints the counts at the end of the run)
    if not TALLY["tried"]:
        pytest.skip("counts the cases of the tests above; run the module whole")
    assert TALLY["tried"] >= 2000 and TALLY["passed"] == TALLY["tried"], TALLY
