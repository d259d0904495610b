"""Bad input for every command and option: the cases of ``tests/test_fuzz.py``.

A case is a command line with one thing wrong: a number out of its range or not a
number, a file that is missing, empty, cut short, binary, of another kind or from
another run, an id that is not there (in another case, with spaces), or an output
that cannot be written.  Each must end with exit code 2, a few lines on stderr, no
traceback and no output file.  The files are a small invented tasting club
(internal data; the rules are the project's own).
"""
from __future__ import annotations

import functools
import re
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from typer.testing import CliRunner

from hybrid.cli import app
from hybrid.datasets.club import DEMO_CONFIG, tasting_club, write_samples
from hybrid.estimator.batch import SCALAR

# numbers a careless user types, by kind
NUMBERS = ["0", "-1", "-7", "nan", "inf", "-inf", "1e400", "abc", "", "2.5", "1,000", "0x10", "99999999999999999999"]


@dataclass
class Files:
    """The fixture's files (a trained model, a plan, answers, one of each kind of bad file)."""

    root: Path
    f: dict = field(default_factory=dict)

    def __getitem__(self, key):
        return str(self.f[key])


def build(root: Path) -> Files:
    """Write the club, train two small models (this run's and another run's), plan, answer."""
    root = Path(root)
    club = tasting_club(n_members=150, n_lots=40, n_new=5, seed=3)
    paths = write_samples(root / "club", club)
    cfg = root / "club" / "small.toml"
    cfg.write_text(Path(DEMO_CONFIG).read_text().replace("rank = 5", "rank = 3").replace("epochs = 60 ", "epochs = 4 "))
    F = Files(root, {k: v for k, v in paths.items()})
    F.f["config"] = cfg
    run = CliRunner().invoke
    other = write_samples(root / "other", tasting_club(n_members=150, n_lots=40, n_new=5, seed=4))
    for name, p in (("model", paths), ("other_model", other)):     # this run's, and another run's
        out = root / f"{name}.hybrid"
        done = run(app, ["train", str(p["ratings"]), str(p["lots"]), "--config", str(cfg), "--out", str(out), "--quiet"])
        assert done.exit_code == 0, done.output
        F.f[name] = out
        plan = root / f"{name}-plan.csv"
        done = run(app, ["plan", str(out), "--budget", "30", "--out", str(plan), "--asks", str(root / f"{name}-asks.csv")])
        assert done.exit_code == 0, done.output
        F.f[name.replace("model", "plan")] = plan
    asks = pd.read_csv(root / "model-asks.csv").head(5)
    pd.DataFrame({"member": asks["user"], "lot": asks["item"], "rating": 4.0}).to_csv(root / "answers.csv", index=False)
    F.f["answers"] = root / "answers.csv"
    # a campaign with one wave planned (the campaign commands' cases run against it)
    ledger = root / "club.ledger"
    for args in (["campaign", "start", str(ledger), str(F["model"]), "--budget", "200"],
                 ["campaign", "plan", str(ledger), str(F["model"]), "--budget", "30", "--out", str(root / "w1.csv")]):
        done = run(app, args)
        assert done.exit_code == 0, done.output
    F.f["ledger"] = ledger
    # files of the wrong sort
    bad = root / "bad"
    bad.mkdir()
    (bad / "empty.csv").write_text("")
    (bad / "header.csv").write_text("member,lot,rating\n")
    (bad / "binary.csv").write_bytes(bytes(range(256)) * 8)
    model_bytes = Path(F["model"]).read_bytes()
    (bad / "half.hybrid").write_bytes(model_bytes[:len(model_bytes) // 2])
    (bad / "text.hybrid").write_text("member,lot,rating\nM1,L1,4\n")
    (bad / "folder.csv").mkdir()
    shutil.copyfile(F["model"], bad / "model.csv")
    F.f.update({f"bad_{p.stem}": p for p in bad.iterdir()})
    return F


def as_int(text):
    """The whole number the command line reads from ``text`` (it also takes '3.0'), or None."""
    t = text.strip()
    try:
        return int(t, 10)
    except ValueError:
        pass
    whole = re.fullmatch(r"([+-]?\d+)\.0*", t)
    return int(whole.group(1)) if whole else None


def _int_ok(low, high=None):
    def ok(text):
        value = as_int(text)
        return value is not None and value >= low and (high is None or value <= high)
    return ok


def _float_ok(test):
    def ok(text):
        try:
            value = float(text)
        except ValueError:
            return False
        return value == value and abs(value) != float("inf") and test(value)
    return ok


def _choice_ok(*options):
    return lambda text: text in options


def _columns_ok(*columns):
    # a comma-separated list of the file's columns; empty parts are dropped ('' keeps none)
    return lambda text: all(part.strip() in columns for part in text.split(",") if part.strip())


FORMATS = ("table", "csv", "json")
# the lots' columns (the id, lot, aside): what --by and --keep may name
LOT_COLUMNS = ("name", "notes", "region", "process", "roast", "altitude_m", "price", "certifications", "arrival",
               "margin")
ENGINES = ("local",)          # 'dask' is valid too, but starts a cluster: not fuzzed


@dataclass
class Command:
    """A valid command line (``base``), its options with the rule a value must meet, its input
    files and its output options.  ``cheap`` commands also run every valid value drawn, to show
    that those do not crash either."""

    name: str
    base: callable
    options: dict
    inputs: dict
    outputs: dict
    cheap: bool = True


@functools.lru_cache(maxsize=64)
def _pool_size(model_path: str, k: int) -> int:
    from hybrid import load
    from hybrid.common.errors import InputError
    from hybrid.planning.assess import Assessor

    model = load(model_path)
    try:
        return len(Assessor(model, k=k, draws=2, candidate_min_ratings=model.settings_["plan"]["candidate_min_ratings"]).pool)
    except InputError:   # too few candidates for this k: the planner refuses it
        return 0


def _k_ok(model_path: str):
    # a neighbour list of k needs more than k candidates; a catalogue with few well-rated items
    # takes its 4k most-rated ones (hybrid.planning.assess.Assessor), so the bound moves with k
    def ok(text):
        k = as_int(text)
        return k is not None and 1 <= k <= 10 ** 6 and k < _pool_size(model_path, k)
    return ok


def commands(F: Files, out: Path) -> list[Command]:
    o = lambda ending: str(out / f"out{ending}")
    return [
        Command("train", lambda: ["train", F["ratings"], F["lots"], "--config", F["config"], "--out", o(".hybrid"), "--quiet"],
                {"--partitions": _int_ok(1), "--engine": _choice_ok(*ENGINES), "--format": _choice_ok(*FORMATS)},
                {1: "ratings", 2: "lots", "--config": "config"}, {"--out": ".hybrid"}, cheap=False),
        Command("score", lambda: ["score", F["model"], F["new_lots"], "--out", o(".csv")],
                {"--liked": _float_ok(lambda v: True), "--audience": _int_ok(0), "--neighbours": _int_ok(0),
                 "--chunk": _int_ok(1), "--engine": _choice_ok(*ENGINES), "--format": _choice_ok(*FORMATS),
                 "--audience-by": _choice_ok("taste", "rating"), "--interval": _float_ok(lambda v: 0 < v < 1),
                 "--keep": _columns_ok(*LOT_COLUMNS),
                 "--sort": _choice_ok(*SCALAR, "name")},     # the one-value columns, and the kept name
                {1: "model", 2: "new_lots", "--config": "config"}, {"--out": ".csv"}),
        Command("why", lambda: ["why", F["model"], "L0001"],
                {"--top": _int_ok(0), "--format": _choice_ok(*FORMATS)}, {1: "model", "--new-items": "new_lots"}, {}),
        Command("related", lambda: ["related", F["model"], "L0001", "--k", "3"],
                {"--k": _int_ok(1), "--metric": _choice_ok("euclidean", "cosine"),
                 "--format": _choice_ok(*FORMATS)},
                {1: "model", "--new-items": "new_lots"}, {}),
        Command("inspect", lambda: ["inspect", F["model"]], {"--format": _choice_ok(*FORMATS)}, {1: "model"}, {}),
        Command("plan", lambda: ["plan", F["model"], "--out", o(".csv"), "--budget", "20"],
                {"--target": _float_ok(lambda v: 0 < v <= 1), "--k": _k_ok(str(F["model"])), "--budget": _int_ok(0),
                 "--per-user": _int_ok(1), "--per-item": _int_ok(1),
                 "--priority": _choice_ok("margin", "price", "altitude_m"), "--aim": _choice_ok("reach", "gain"),
                 "--max-needed": _int_ok(1),
                 "--engine": _choice_ok(*ENGINES), "--format": _choice_ok(*FORMATS)},
                {1: "model", "--new-items": "new_lots", "--items": "new_lots", "--config": "config"},
                {"--out": ".csv", "--asks": ".csv"}),
        Command("update", lambda: ["update", F["model"], F["answers"], "--out", o(".hybrid")],
                {"--format": _choice_ok(*FORMATS)}, {1: "model", 2: "answers", "--new-items": "new_lots", "--config": "config"},
                {"--out": ".hybrid"}),
        Command("calibrate", lambda: ["calibrate", F["ratings"], F["lots"], "--config", F["config"], "--probes", "5"],
                {"--probes": _int_ok(1), "--seed": _int_ok(0), "--format": _choice_ok(*FORMATS),
                 "--protocol": _choice_ok("hidden", "update")},
                {1: "ratings", 2: "lots", "--config": "config"}, {}, cheap=False),
        Command("evaluate", lambda: ["evaluate", F["ratings"], F["lots"], "--config", F["config"], "--folds", "2"],
                {"--protocol": _choice_ok("cold", "warm", "few"), "--folds": _int_ok(2, 100), "--seed": _int_ok(0),
                 "--min-ratings": _int_ok(1), "--format": _choice_ok(*FORMATS)},
                {1: "ratings", 2: "lots", "--config": "config"}, {}, cheap=False),
        Command("tune", lambda: ["tune", F["ratings"], F["lots"], "--config", F["config"], "--trials", "1", "--out", o(".toml")],
                {"--trials": _int_ok(1), "--seed": _int_ok(0), "--format": _choice_ok(*FORMATS)},
                {1: "ratings", 2: "lots", "--config": "config"}, {"--out": ".toml"}, cheap=False),
        *campaign_commands(F, o),
        Command("report", lambda: ["report", F["model"], "--plan", F["plan"], "--out", o(".html")],
                {"--by": _choice_ok(*LOT_COLUMNS)},
                {1: "model", "--plan": "plan", "--config": "config", "--campaign": "ledger"}, {"--out": ".html"}),
    ]


def campaign_commands(F: Files, o) -> list[Command]:
    """The campaign's commands, against a ledger with one wave planned.  Those that change the
    ledger run only their bad cases (``cheap=False``), so it stays as built."""
    ledger = lambda: F["ledger"]
    return [
        Command("campaign start", lambda: ["campaign", "start", str(F.root / "fresh.ledger"), F["model"]],
                {"--budget": _int_ok(0), "--per-user": _int_ok(1), "--cooling-off": _int_ok(0),
                 "--first-response": _float_ok(lambda v: 0 < v <= 1), "--priority": _choice_ok("margin", "price", "altitude_m"),
                 "--format": _choice_ok(*FORMATS)},
                {3: "model", "--config": "config"}, {}, cheap=False),
        Command("campaign plan", lambda: ["campaign", "plan", ledger(), F["model"], "--out", o(".csv"), "--budget", "10"],
                {"--budget": _int_ok(1), "--format": _choice_ok(*FORMATS)},
                {2: "ledger", 3: "model"}, {"--out": ".csv", "--asks": ".csv"}, cheap=False),
        Command("campaign contacts", lambda: ["campaign", "contacts", ledger(), "--out", o(".csv")],
                {"--wave": _int_ok(1, 1), "--format": _choice_ok(*FORMATS)}, {2: "ledger"}, {"--out": ".csv"}),
        Command("campaign answers", lambda: ["campaign", "answers", ledger(), F["model"], F["answers"], "--out", o(".hybrid")],
                {"--wave": _int_ok(1, 1), "--format": _choice_ok(*FORMATS)},
                {2: "ledger", 3: "model", 4: "answers", "--new-items": "new_lots"}, {"--out": ".hybrid"}, cheap=False),
        Command("campaign progress", lambda: ["campaign", "progress", ledger()],
                {"--format": _choice_ok(*FORMATS)}, {2: "ledger"}, {}),
        Command("campaign opt-out", lambda: ["campaign", "opt-out", ledger(), "--file", F["answers"]],
                {"--format": _choice_ok(*FORMATS)}, {2: "ledger", "--file": "answers"}, {}, cheap=False),
        Command("campaign erase", lambda: ["campaign", "erase", ledger(), "M00001", "--model", F["model"], "--out", o(".hybrid")],
                {"--format": _choice_ok(*FORMATS)}, {2: "ledger", "--model": "model"}, {"--out": ".hybrid"}, cheap=False),
    ]


JUNK_WORDS = ["", "xyz", "JSON", " csv", "Table", "-1", "nan", "--help-me"]


def _with(args, option, value):
    """``args`` with ``option`` set to ``value`` (replaced if present, else added)."""
    args = list(args)
    if isinstance(option, int):
        args[option] = value
    elif option in args:
        args[args.index(option) + 1] = value
    else:
        args += [option, value]
    return args


def bad_files(F: Files, slot_kind: str) -> dict:
    """Files of the wrong sort for a slot of ``slot_kind``."""
    kinds = {"missing": str(F.root / "no-such-file.csv"), "empty": F["bad_empty"], "binary": F["bad_binary"],
             "folder": F["bad_folder"]}
    if slot_kind in ("model",):
        kinds.update(truncated=F["bad_half"], text=F["bad_text"], ratings=F["ratings"])
    elif slot_kind == "config":     # (an empty file is a valid TOML file: every default)
        kinds.pop("empty")
        kinds.update(csv=F["ratings"], model=F["model"])
    elif slot_kind == "plan":
        kinds.update(header_only=F["bad_header"], other_run=F["other_plan"], model=F["model"])
    else:
        kinds.update(header_only=F["bad_header"], model=F["bad_model"])
    return kinds


def cases(F: Files, out: Path):
    """Every ``(label, args, expect, output)``: ``expect`` is 'bad' (must exit 2) or 'valid'."""
    for cmd in commands(F, out):
        base = cmd.base()
        for option, ok in cmd.options.items():
            for value in NUMBERS + JUNK_WORDS:
                expect = "valid" if ok(value) else "bad"
                if expect == "valid" and not cmd.cheap:
                    continue
                yield f"{cmd.name} {option} {value!r}", _with(base, option, value), expect, cmd
        for slot, kind in cmd.inputs.items():
            for label, path in bad_files(F, kind).items():
                yield f"{cmd.name} {slot} {label}", _with(base, slot, path), "bad", cmd
        for option, ending in cmd.outputs.items():
            targets = {"missing folder": str(F.root / "no-such-folder" / f"x{ending}"),
                       "read-only place": f"/proc/hybrid-fuzz{ending}",   # read-only even for root
                       "unknown ending": str(out / ("x.csv" if ending == ".hybrid" else "x.xlsx")),
                       "a folder": str(out)}
            for label, path in targets.items():
                yield f"{cmd.name} {option} {label}", _with(base, option, path), "bad", cmd
    related = next(c for c in commands(F, out) if c.name == "related")
    for item in ("ZZZ", "l0001", " L0001", "L0001 ", "", "L00001"):
        yield f"related id {item!r}", _with(related.base(), 2, item), "bad", related
