"""The command-line grammar of docs/cli.md, checked on every subcommand's parser.

Walks every parser `benchharness.cli.build_parser` builds and fails when a concept has a
second (non-deprecated) spelling, an option lacks help, an epilog lacks examples, or a
command that produces a result lacks ``--json`` / ``--json-out``; then runs every such
command with ``--json`` on a small planted experiment (two sleeps whose lengths are known)
and reads its whole standard output with ``json.loads``, checking what the document says.
"""

from __future__ import annotations

import argparse
import json
import math
import sys

import pytest

from benchharness import values as V
from benchharness.cli import build_parser, main
from benchharness.commands import options as O

#: Commands that produce a result, each of which must take --json and --json-out.
RESULT_COMMANDS = {"plan", "run", "analyze", "report", "choose", "gate", "size", "compare",
                   "history add", "history show", "host", "steady"}
POSITIONAL_METAVARS = {"FILE", "SOURCE", "FOLDER", "A", "B"}


def _parsers():
    """(command words, parser) for every command and action."""
    out = []

    def walk(words, parser):
        sub = next((a for a in parser._actions if isinstance(a, argparse._SubParsersAction)),
                   None)
        if sub is None:
            out.append((" ".join(words), parser))
            return
        if words:
            out.append((" ".join(words), parser))
        for name, child in sub.choices.items():
            walk([*words, name], child)

    walk([], build_parser())
    return out


PARSERS = _parsers()


@pytest.fixture(autouse=True)
def _fresh_notes():
    """Deprecation notes are said once per process; each test starts afresh."""
    V._said.clear()
    yield
    V._said.clear()
DEPRECATED = {old: concept for concept, (_, olds) in O.GRAMMAR.items() for old in olds}


def test_every_command_is_walked():
    names = {name for name, _ in PARSERS}
    assert RESULT_COMMANDS <= names, RESULT_COMMANDS - names


@pytest.mark.parametrize("name,parser", PARSERS, ids=[n for n, _ in PARSERS])
def test_one_spelling_per_concept_and_help_for_every_option(name, parser):
    for action in parser._actions:
        if isinstance(action, (argparse._HelpAction, argparse._SubParsersAction)):
            continue
        hidden = action.help is argparse.SUPPRESS
        for opt in action.option_strings:
            if opt in DEPRECATED:
                # an old spelling: allowed only as a hidden alias that says it is deprecated
                assert hidden and isinstance(action, O._Alias), (
                    f"{name}: {opt} is a second spelling of '{DEPRECATED[opt]}'; write "
                    f"{O.GRAMMAR[DEPRECATED[opt]][0]}")
        if hidden:
            assert isinstance(action, O._Alias), f"{name}: {action.option_strings} is hidden " \
                                                 "but not a deprecated alias"
            continue
        assert action.help and action.help.strip(), f"{name}: {action.dest} has no help text"
        if not action.option_strings:
            assert action.metavar in POSITIONAL_METAVARS, (
                f"{name}: positional {action.dest} is shown as {action.metavar!r}; use one of "
                f"{sorted(POSITIONAL_METAVARS)}")


def test_help_texts_write_the_multiplication_sign():
    """Ratios and products are written with ×, never a letter x (docs/cli.md), in --help too:
    `steady` was 'executions x iterations advice'."""
    import re

    texts = []
    for name, parser in PARSERS:
        texts += [parser.description or "", parser.epilog or ""]
        texts += [a.help for a in parser._actions if isinstance(a.help, str)]
        sub = next((a for a in parser._actions if isinstance(a, argparse._SubParsersAction)),
                   None)
        texts += [c.help or "" for c in (sub._choices_actions if sub else [])]
    # (a value typed as `1.05x` is an accepted input spelling; a product is "runs × iterations")
    bad = [t for t in texts if re.search(r"\sx\s", t)]
    assert not bad, bad


@pytest.mark.parametrize("name,parser", PARSERS, ids=[n for n, _ in PARSERS])
def test_every_help_ends_with_real_examples(name, parser):
    epilog = parser.epilog or ""
    assert epilog.startswith("examples:"), f"{name}: --help has no examples"
    lines = [ln.strip() for ln in epilog.splitlines()]
    examples = [ln for ln in lines if ln.startswith(f"benchharness {name} ")]
    assert len(examples) >= 2, (name, epilog)
    # every example parses with this very parser (it is a real command line)
    import shlex

    for ex in (ln for ln in lines if ln.startswith("benchharness ")):
        words = shlex.split(ex.split(" > ")[0])[1:]
        args, extras = build_parser().parse_known_args(words)
        assert not extras, (ex, extras)
    text = parser.format_help()
    assert text.rstrip().splitlines()[-1].strip(), "help ends with a blank line"


@pytest.mark.parametrize("name", sorted(RESULT_COMMANDS))
def test_json_options_mean_one_thing(name):
    parser = dict(PARSERS)[name]
    by_opt = {o: a for a in parser._actions for o in a.option_strings}
    assert isinstance(by_opt["--json"], argparse._StoreTrueAction), name
    assert by_opt["--json-out"].metavar == "FILE", name


#: A concept recognised by the words of an option's name, whatever new spelling it gets:
#: (concept in O.GRAMMAR, pattern). An option whose name matches must be the concept's one
#: spelling (or a hidden deprecated alias), so `--alpha2`, `--significance` or `--database`
#: cannot slip in beside `--confidence` and `--history-db`.
CONCEPT_WORDS = [
    ("confidence (significance = 100% - confidence)",
     r"alpha|signif|confid|false-step|conf-level"),
    ("direction of better", r"better|worse|direction|higher|lower"),
    ("history database", r"(^--|-)db$|database|^--history"),
    ("seed of the run order", r"seed"),
    ("time budget", r"budget|time-limit|deadline"),
    ("warm-up runs", r"warm"),
    ("response column", r"^--(response|metric)s?$"),
]
#: dest -> the one option that may store into it (an alias may too, hidden)
CONCEPT_DESTS = {"confidence": "--confidence", "better": "--better",
                 "history_db": "--history-db", "json": "--json", "json_out": "--json-out",
                 "seed": "--seed", "budget": "--budget", "warmup_runs": "--warmup-runs",
                 "response": "--response", "factors": "--factors", "pilot": "--pilot"}
#: the value kinds of docs/cli.md "Values": metavar <-> the one parser of that kind
VALUE_KINDS = {"PCT": {"percentage", "confidence"}, "RATIO": {"ratio"},
               "DURATION": {"duration"}}
#: options that write a file: each must refuse '-' as a file name (`options.out_file`)
OUTPUT_NAMES = r"^--(out|json-out|html|junit|summary|markdown)$|-out$"
#: plain floats that are none of the value kinds above, with the reason
PLAIN_FLOATS = {("size", "--slope"): "a log-log exponent, not a percentage or a ratio"}


def _visible(parser):
    for action in parser._actions:
        if action.option_strings and action.help is not argparse.SUPPRESS \
                and not isinstance(action, argparse._HelpAction):
            yield action


@pytest.mark.parametrize("name,parser", PARSERS, ids=[n for n, _ in PARSERS])
def test_no_new_spelling_of_a_concept(name, parser):
    import re

    for action in _visible(parser):
        for opt in action.option_strings:
            for concept, pattern in CONCEPT_WORDS:
                one = O.GRAMMAR[concept][0]
                if re.search(pattern, opt):
                    assert opt == one, (f"{name}: {opt} looks like a second spelling of "
                                        f"'{concept}'; write {one}")
            if "json" in opt:
                assert opt in ("--json", "--json-out"), f"{name}: {opt}: JSON is --json " \
                                                        "(stdout) or --json-out FILE"
        want = CONCEPT_DESTS.get(action.dest)
        if want is not None:
            assert action.option_strings == [want], (
                f"{name}: {action.option_strings} store {action.dest!r}; spell it {want}")


@pytest.mark.parametrize("name,parser", PARSERS, ids=[n for n, _ in PARSERS])
def test_each_value_kind_is_read_by_its_one_parser(name, parser):
    import re

    for action in _visible(parser):
        opt = action.option_strings[0]
        kind = getattr(action.type, "__name__", None)
        if action.metavar in VALUE_KINDS:
            assert kind in VALUE_KINDS[action.metavar], (
                f"{name}: {opt} {action.metavar} is not read by the {action.metavar} parser "
                "of benchharness.commands.options")
        for metavar, kinds in VALUE_KINDS.items():
            if kind in kinds:
                assert action.metavar == metavar, f"{name}: {opt} should show {metavar}"
        if action.type is float:
            assert (name, opt) in PLAIN_FLOATS, (
                f"{name}: {opt} reads a bare float; a percentage, ratio or duration takes "
                "options.percent / ratio / duration (docs/cli.md, Values)")
        if re.search(OUTPUT_NAMES, opt):
            assert kind == "path", (f"{name}: {opt} writes a file but does not refuse '-' "
                                    "(use options.out_file)")
            stdout_ok = opt in ("--json-out",) or (name, opt) == ("report", "--markdown")
            try:
                action.type("-")
                took_dash = True
            except argparse.ArgumentTypeError:
                took_dash = False
            assert took_dash == stdout_ok, (name, opt, "'-' handling")


def test_gate_options_say_what_they_count():
    gate = dict(PARSERS)["gate"]
    shown = {o for a in gate._actions if a.help is not argparse.SUPPRESS
             for o in a.option_strings}
    assert {"--max-pairs", "--first-look-pairs", "--warmup-runs", "--better",
            "--history-db"} <= shown
    assert not shown & {"--max-runs", "--min-runs", "--warmup", "--higher-is-better",
                        "--history"}


# --- the values: one parser each -------------------------------------------------------

@pytest.mark.parametrize("text,value", [("5%", 0.05), ("0.05", 0.05), ("95%", 0.95),
                                        ("0.95", 0.95), ("0%", 0.0), ("2.5 %", 0.025)])
def test_percent_and_fraction_mean_the_same(text, value):
    assert V.parse_percent(text) == pytest.approx(value)


@pytest.mark.parametrize("text,hint", [("5", "did you mean 5%?"), ("1", "did you mean 1%?"),
                                       ("95", "did you mean 95%?"), ("five", "5%")])
def test_bare_percent_of_one_or_more_is_refused(text, hint):
    with pytest.raises(V.ValueFormError, match=hint.replace("?", r"\?")):
        V.parse_percent(text)


@pytest.mark.parametrize("text,value", [("1.05", 1.05), ("1.05x", 1.05), ("1.05×", 1.05),
                                        ("5%", 1.05), ("2x", 2.0), ("50%", 1.5)])
def test_ratio_forms(text, value):
    assert V.parse_ratio(text) == pytest.approx(value)


def test_a_ratio_option_gives_the_change_exactly():
    # `--tolerance 5%` is a 5% change, not 0.050000000000000044 (which gate.json once said)
    assert V.change_of(V.parse_ratio("5%")) == 0.05
    assert V.change_of(V.parse_ratio("1.05x")) == 0.05


def test_ratio_refuses_ambiguous_and_notes_old_fraction(capsys):
    with pytest.raises(V.ValueFormError, match="5% .* or 5x"):
        V.parse_ratio("5")
    assert V.parse_ratio("0.07", what="--tolerance") == pytest.approx(1.07)
    assert "deprecated" in capsys.readouterr().err


@pytest.mark.parametrize("text,seconds", [("90s", 90), ("5m", 300), ("250ms", 0.25),
                                          ("1h30m", 5400), ("2m 30s", 150), ("1.5h", 5400)])
def test_durations_carry_units(text, seconds):
    assert V.parse_duration(text) == pytest.approx(seconds)


@pytest.mark.parametrize("text", ["60", "5 minutes", "30s 1m", "1x"])
def test_duration_without_a_unit_is_refused(text):
    with pytest.raises(V.ValueFormError) as info:
        V.parse_duration(text)
    if text == "60":
        assert "did you mean 60s?" in str(info.value)


def test_file_timeout_without_unit_is_a_located_error(tmp_path, capsys):
    f = tmp_path / "t.yaml"
    f.write_text("experiment: t\ncommand: [/bin/true]\nfactors:\n  a: [x, y]\ntimeout: 60\n")
    # an experiment file where a results folder or CSV is wanted: said as such, not "a CSV
    # needs --factors" (every SOURCE is read by options.source)
    for argv, cmd in [(["analyze", str(f)], "analyze"), (["choose", str(f)], "choose"),
                      (["size", "--detect", "5%", "--pilot", str(f)], "size")]:
        with pytest.raises(SystemExit) as info:
            main(argv)
        err = capsys.readouterr().err.strip()
        assert info.value.code == 2 and f"{f} is an experiment file; give the results " \
            "folder a run of it wrote" in err and err.endswith(
                f"(see `benchharness {cmd} --help`)"), err
    for name, parser in PARSERS:
        for action in parser._actions:
            if action.metavar == "SOURCE":
                assert getattr(action.type, "__name__", None) == "source", (name, action.dest)
    assert main(["plan", str(f)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"{f}:5:10:" in err[0] and "did you mean 60s?" in err[0], err


# --- mistakes: suggestions that point at the command's own help -------------------------

def test_misspelt_command_and_option_get_the_nearest(capsys):
    with pytest.raises(SystemExit) as info:
        main(["anlyze", "x"])
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert "did you mean analyze?" in err and "`benchharness --help`" in err
    assert main(["gate", "--tolerence", "5%", "--baseline", "a", "--candidate", "b"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == ("benchharness gate: unknown option --tolerence; did you mean --tolerance? "
                   "(see `benchharness gate --help`)")
    # an option of another command is not "did you mean --help?"
    assert main(["analyze", "x", "--html", "a.html"]) == 2
    assert capsys.readouterr().err.strip() == ("benchharness analyze: unknown option --html "
                                               "(see `benchharness analyze --help`)")
    with pytest.raises(SystemExit):
        main(["history", "shwo"])
    assert "did you mean show?" in capsys.readouterr().err


def test_no_command_or_action_is_a_usage_error_on_stderr(capsys):
    for argv in ([], ["history"]):
        assert main(argv) == 2
        out, err = capsys.readouterr()
        assert out == "" and err.startswith("usage: benchharness") and "examples:" in err


def test_bad_value_names_the_option_and_the_command_help(capsys):
    with pytest.raises(SystemExit) as info:
        main(["size", "--detect", "3%", "--noise-cv", "2", "--levels", "2,2"])
    assert info.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--noise-cv" in err[0] and "did you mean 2%?" in err[0]
    assert "`benchharness size --help`" in err[0]


def test_errors_after_parsing_point_at_the_commands_help(tmp_path, capsys):
    """A mistake in what was asked, found after argparse (a missing folder or file, an
    option the command refuses in combination), names the command and points at its own
    help like argparse's errors; an error inside a file points at FILE:LINE:COL only."""
    missing = tmp_path / "nowhere"
    cases = [(["steady", str(missing)], "steady"), (["analyze", str(missing)], "analyze"),
             (["plan", str(missing)], "plan"),
             (["size", "--detect", "5%"], "size"),
             (["gate", "--baseline", "true"], "gate"),
             (["history", "show", "--history-db", str(missing)], "history show")]
    for argv, cmd in cases:
        assert main(argv) == 2, argv
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1, err
        assert err[0].startswith(f"benchharness {cmd}: "), err
        assert err[0].endswith(f"(see `benchharness {cmd} --help`)"), err
    f = tmp_path / "t.yaml"
    f.write_text("experiment: t\ncommand: [/bin/true]\nfactors:\n  a: [x, y]\ntimeout: 60\n")
    assert main(["plan", str(f)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"benchharness: {f}:5:10: ") and "--help" not in err, err


def test_old_spellings_still_work_with_one_note(capsys):
    p = build_parser()
    args = p.parse_args(["analyze", "x.csv", "--alpha", "0.01"])
    assert args.confidence == pytest.approx(0.99)
    args = p.parse_args(["history", "show", "--false-step-level", "10%", "--db", "h.sqlite"])
    assert args.confidence == pytest.approx(0.90) and args.history_db == "h.sqlite"
    args = p.parse_args(["gate", "--baseline", "a", "--candidate", "b", "--max-runs", "20",
                         "--min-runs", "4", "--warmup", "0", "--higher-is-better",
                         "--history", "h.sqlite"])
    assert (args.max_pairs, args.first_look_pairs, args.warmup_runs, args.better,
            args.history_db) == (20, 4, 0, "higher", "h.sqlite")
    err = capsys.readouterr().err.splitlines()
    for old, new in [("--alpha", "--confidence"), ("--false-step-level", "--confidence"),
                     ("--db", "--history-db"), ("--max-runs", "--max-pairs"),
                     ("--min-runs", "--first-look-pairs"), ("--warmup", "--warmup-runs"),
                     ("--higher-is-better", "--better higher"), ("--history", "--history-db")]:
        assert sum(ln.startswith(f"note: {old} is deprecated; write {new}") for ln in err) == 1
    # the note names the level the user typed, not a stock example: --alpha 0.01 is 99%
    assert "note: --alpha is deprecated; write --confidence 99% (for --alpha 0.01)" in err
    assert ("note: --false-step-level is deprecated; write --confidence 90% "
            "(for --false-step-level 10%)") in err


def test_old_significance_note_follows_the_value(capsys):
    """``size --alpha 0.001`` asks for tests at 0.1%: the note and the answer both say so."""
    assert main(["size", "--detect", "10%", "--noise-cv", "5%", "--levels", "2,2",
                 "--alpha", "0.001"]) == 0
    out, err = capsys.readouterr()
    assert "note: --alpha is deprecated; write --confidence 99.9% (for --alpha 0.001)" in err
    assert "95%" not in err and "tests at 99.9% confidence" in out


# --- --json: one document on stdout, for every command that produces a result -----------

#: per-iteration samples every run prints: five warm-up iterations from 30 ms down to 22 ms,
#: then 35 steady ones of 10.0-10.4 ms (mean 10.2 ms)
SAMPLES = " ".join([f"{30 - 2 * i}" for i in range(5)]
                   + [f"{10 + (i * 7) % 5 * 0.1:g}" for i in range(5, 40)])

EXPERIMENT = f"""\
experiment: grammar-fixture
command: [/bin/sh, -c, "printf '%s\\\\n' {SAMPLES}; sleep {{speed.s}}"]
factors:
  speed: {{fast: {{s: "0.02"}}, slow: {{s: "0.25"}}}}
  input: [small, large]
roles:
  workload: [input]
replicates: 3
order: randomized
seed: 5
timeout: 30s
samples: {{format: lines, unit: ms, target: 5%}}
"""


def _json(capsys, argv, code=0):
    """Run the command in-process; its whole stdout must be one JSON document."""
    got = main([*map(str, argv), "--json"])
    out, err = capsys.readouterr()
    assert got == code, (argv, got, err[-2000:])
    return json.loads(out), err


@pytest.fixture(scope="module")
def fixture_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("grammar")
    (d / "exp.yaml").write_text(EXPERIMENT)
    return d


def test_every_result_command_prints_one_json_document(fixture_dir, capsys, monkeypatch):
    d = fixture_dir
    monkeypatch.chdir(d)
    exp, res = d / "exp.yaml", d / "res"

    plan, _ = _json(capsys, ["plan", exp])
    assert plan["cells"] == 4 and plan["runs"] == 12

    run, err = _json(capsys, ["run", exp, "--out", res, "--quiet"])
    # the human summary went to stderr, the document to stdout
    assert run["results_folder"] == str(res) and run["counts"]["ok"] == 12
    assert run["exit_code"] == 0 and "analysis.json" in run["files"]
    assert "grammar-fixture" in err

    an, _ = _json(capsys, ["analyze", res])
    # planted: the slow level sleeps 0.23 s longer than the fast one, so `speed` is a
    # significant main effect and the fast level is the best setting
    row = next(r for r in an["anova"] if r["term"] == "speed")
    assert row["p"] < 0.001

    choice, _ = _json(capsys, ["choose", res])
    assert choice["best"] == {"speed": "fast"}

    rep, _ = _json(capsys, ["report", res])
    assert rep["html"].endswith("report.html") and (res / "report.md").exists()
    assert rep["headline"]

    same, _ = _json(capsys, ["compare", res, res])
    # a folder compared with itself: every ratio is exactly 1 (every difference 0 on a linear
    # scale), every interval holds it, and no cell is said to have changed (three runs a
    # cell may be too few to say "within": with quiet runs the interval can fit in the band)
    none = 1.0 if same["scale"] == "log" else 0.0
    assert all(math.isclose(c["estimate"], none, abs_tol=1e-12) for c in same["cells"])
    assert all(c["low"] < none < c["high"] for c in same["cells"])
    assert {c["verdict"] for c in same["cells"]} <= {"within", "unclear"}   # docs/history.md
    # one folder is one session: the warning says so rather than "different sessions"
    assert same["warnings"][0].startswith("A and B are the same results folder")
    assert not any("different sessions" in w for w in same["warnings"])

    db = d / "h.sqlite"
    added, _ = _json(capsys, ["history", "add", res, "--commit", "c1", "--branch", "main",
                              "--history-db", db])
    assert added["added"][0]["cell_rows_added"] == 4
    shown, _ = _json(capsys, ["history", "show", "--history-db", db])
    assert len(shown["cells"]) == 4

    st, _ = _json(capsys, ["steady", res])
    # planted samples: after five warm-up iterations every run settles at 10.2 ms
    for c in st["cells"]:
        assert c["components"]["mean_s"] == pytest.approx(0.0102, rel=0.01)

    size, _ = _json(capsys, ["size", "--detect", "5%", "--noise-cv", "2%", "--levels", "2,2"])
    assert size["replicates"] >= 2

    host, _ = _json(capsys, ["host"])
    assert set(host) == {"facts", "warnings"}

    gate, _ = _json(capsys, ["gate", "--baseline", "sleep 0.02", "--candidate", "sleep 0.25",
                             "--max-pairs", "8", "--first-look-pairs", "4", "--warmup-runs",
                             "0", "--seed", "3", "--out", d / "gate"], code=1)
    # planted: the candidate takes more than ten times as long: a regression, exit 1
    assert gate["verdict"] == "worse"
    assert not (d / "-").exists()


def test_json_out_and_the_old_json_file(fixture_dir, capsys, monkeypatch):
    d = fixture_dir
    monkeypatch.chdir(d)
    f = d / "plan.json"
    assert main(["plan", str(d / "exp.yaml"), "--json-out", str(f)]) == 0
    out = capsys.readouterr().out
    assert "experiment  grammar-fixture" in out  # the usual output stays on stdout
    assert json.loads(f.read_text())["cells"] == 4
    assert main(["plan", str(d / "exp.yaml"), "--json-out", "-"]) == 0
    assert json.loads(capsys.readouterr().out)["cells"] == 4
    # the old `--json FILE` of size: not a spelling there; `--junit -` is never a file
    with pytest.raises(SystemExit):
        main(["gate", "--baseline", "a", "--candidate", "b", "--junit", "-"])
    assert "not accepted here" in capsys.readouterr().err
    assert not (d / "-").exists()


@pytest.mark.skipif(sys.platform != "linux", reason="uses /bin/true")
def test_legacy_json_file_still_written(tmp_path, capsys):
    csv = tmp_path / "t.csv"
    csv.write_text("a,wall_s\n" + "".join(f"{lv},{1 + i * 0.01 + (lv == 'y')}\n"
                                          for i in range(4) for lv in "xy"))
    target = tmp_path / "an.json"
    assert main(["analyze", str(csv), "--factors", "a", "--json", str(target)]) == 0
    err = capsys.readouterr().err
    assert "note: --json FILE is deprecated; write --json-out" in err
    assert json.loads(target.read_text())["response"] == "wall_s"
    assert main(["analyze", str(csv), "--factors", "a", "--json", "-"]) == 0
    out, err = capsys.readouterr()
    assert json.loads(out)["response"] == "wall_s" and "--json - is deprecated" in err


def test_a_refused_first_history_add_leaves_no_file(tmp_path, capsys, monkeypatch):
    """Outside git and without --commit, `history add` is refused (exit 2): the history
    file (and its folder) it would have created are not left behind empty, so a later
    `history show` says there is no history file rather than "no rows match"."""
    from history_helpers import write_folder

    folder = write_folder(tmp_path / "res", "spool", {"pool": ["2", "8"]},
                          {("2",): [0.1, 0.11], ("8",): [0.2, 0.21]})
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    monkeypatch.setenv("GIT_CEILING_DIRECTORIES", str(tmp_path))
    assert main(["history", "add", str(folder)]) == 2
    assert "no --commit given" in capsys.readouterr().err
    assert list(work.iterdir()) == []
    assert main(["history", "add", str(folder), "--commit", "c1", "--branch", "main"]) == 0
    assert (work / "results" / "history.sqlite").is_file()
