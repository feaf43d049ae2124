"""What users read (issue 15, items 8, 9, 11, 12, 14, 15, 16): help, errors, wording.

Messages are checked for their content and for being one line without Python text
(no traceback, no ``Errno``, no bytes literal); the numbers printed are checked against
closed forms where the wording carries numbers.
"""

from __future__ import annotations

import importlib
import math
import re
from pathlib import Path

import pytest

from certify.cli import COMMANDS, main, module_name

ROOT = Path(__file__).resolve().parent.parent
DATA = Path(__file__).resolve().parent / "data"
DECAY = DATA / "prove_decay.toml"
FERMENTER = ROOT / "models" / "fermenter.toml"

# x' = -x from [1, 4] with a floor at 0.5 and time in seconds: the start x0 crosses the
# floor at t = ln(2 x0) (closed form), so every start is doomed.
DECAY_SECONDS = """
[model]
name = "decay in seconds"
time_unit = "s"
[states]
x = [1, 4]
[equations]
x = "-x"
[constraints]
floor = "x >= 0.5"
"""
# A stable spiral in a disc that is invariant (d(x^2+y^2)/dt = -2(x^2+y^2)): nothing is
# doomed, so nothing may be said about crossing times.
DISC = (Path(__file__).parent / "data" / "spiral_disc.toml").read_text()


def _one_line(err):
    assert err.count("\n") == 1, err
    assert "Traceback" not in err and "Errno" not in err and "b'" not in err, err
    return err


@pytest.mark.parametrize("command", COMMANDS)
def test_every_help_names_its_exit_codes(command, capsys):
    module = importlib.import_module(module_name(command))
    assert main([command, "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert f"Exit codes: {module.EXITS}." in text
    codes = {int(c) for c in re.findall(r"(?:^|, )(\d+) ", module.EXITS)}
    assert {0, 2, 130} <= codes  # every command: done, user mistake, Ctrl-C (cli.main)
    if command == "claim":
        assert codes == {0, 1, 2, 3, 130}
    if command in ("check", "diff", "demo"):
        assert 1 in codes


def test_main_help_names_every_exit_code(capsys):
    assert main(["--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    for phrase in ("0 done", "1 not verified", "2 usage or input error", "3 claim inconclusive",
                   "130 interrupted"):
        assert phrase in text


def test_budget_defaults_in_help(capsys):
    from certify.prove import Budget

    main(["prove", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert f"else {Budget().max_depth})" in text
    assert f"else {Budget().max_cells:,})" in text
    assert "[settings]" in text


@pytest.fixture
def no_work(monkeypatch):
    """Make any proof or comparison fail loudly: the folder must be refused before."""
    def refuse(*args, **kwargs):
        raise AssertionError("work started before --out was checked")
    targets = [(importlib.import_module(module), name) for module, name in (
        ("certify.prove", "prove"), ("certify.claim", "check_claim"),
        ("certify.sweep", "sweep"), ("certify.diff", "diff_certificates"))]
    for module, name in targets:  # all imported first: none keeps a patched name
        monkeypatch.setattr(module, name, refuse)


@pytest.mark.parametrize("argv", [
    ["prove", str(DECAY)],
    ["claim", str(DECAY), "--region", "x=1:2", "--expect", "doomed"],
    ["sweep", str(DATA / "sweep_fishery.toml"), "--vary", "H=0.1:0.2:2"],
    ["diff", "OLD", "NEW"],
])
def test_out_is_checked_before_any_work(argv, tmp_path, capsys, no_work):
    a_file = tmp_path / "a_file"
    a_file.write_text("")
    for out, message in ((a_file, "is a file, not a folder"),
                         (a_file / "below", f"{a_file} is a file, not a folder")):
        assert main([*argv, "--out", str(out)]) == 2
        err = _one_line(capsys.readouterr().err)
        assert f"--out {out}: {message}" in err
        assert not (a_file / "below").exists()


@pytest.fixture(scope="module")
def decay_out(tmp_path_factory):
    out = tmp_path_factory.mktemp("decay")
    assert main(["prove", str(DECAY), "--out", str(out), "--max-depth", "3", "--quiet"]) == 0
    return out


@pytest.mark.parametrize("argv, message", [
    (["check", "{model}"], "text (a model file?); expected a certificate"),
    (["check", "{summary}"], "JSON that is not gzip-compressed; expected a certificate"),
    (["check", "{empty}"], "the folder holds no certificate.json.gz"),
    (["prove", "{cert}"], "a gzip-compressed file (a certificate?), not a model file"),
    (["prove", "{out}"], "is a directory, not a model file"),
])
def test_wrong_files_are_named_in_one_line(argv, message, decay_out, tmp_path, capsys):
    paths = {"model": DECAY, "summary": decay_out / "summary.json", "empty": tmp_path,
             "cert": decay_out / "certificate.json.gz", "out": decay_out}
    assert main([a.format(**paths) for a in argv]) == 2
    assert message in _one_line(capsys.readouterr().err)


def test_check_accepts_the_folder_diff_accepts(decay_out, capsys):
    assert main(["check", str(decay_out), "--quiet"]) == 0
    assert capsys.readouterr().out.startswith("VALID")


def test_check_workers_is_the_sweep_name(decay_out, capsys):
    assert main(["check", str(decay_out), "--workers", "1", "--quiet"]) == 0
    assert main(["check", str(decay_out), "--workers", "0"]) == 2
    assert "--workers must be at least 1" in _one_line(capsys.readouterr().err)


def test_depth_range_is_the_settings_range(capsys):
    from certify.model import SETTINGS

    rule = SETTINGS["max_depth"]
    for command in (["prove", str(DECAY)], ["points", str(DECAY)],
                    ["claim", str(DECAY), "--region", "x=1:2", "--expect", "safe"]):
        assert main([*command, "--max-depth", str(rule.hi + 1)]) == 2
        assert f"between {rule.lo} and {rule.hi}" in _one_line(capsys.readouterr().err)


def test_nothing_safe_yet_is_said(tmp_path, capsys):
    # at cells of 1/8 of each side nothing of the fermenter is proven safe (docs/labels.md
    # reports the first safe cells at 1/128)
    assert main(["prove", str(FERMENTER), "--max-depth", "3", "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "nothing is proven safe at depth 3 yet" in out and "--max-depth" in out


def test_no_crossing_time_when_nothing_is_doomed(tmp_path, capsys):
    model = tmp_path / "disc.toml"
    model.write_text(DISC)
    assert main(["prove", str(model), "--max-depth", "4", "--out", str(tmp_path / "o")]) == 0
    out = capsys.readouterr().out
    assert re.search(r"doomed\s+0\s", out)
    assert "crosses a limit within" not in out
    assert "not about the system it describes" in out and "plant" not in out


def test_claim_words_and_units(tmp_path, capsys):
    model = tmp_path / "decay.toml"
    model.write_text(DECAY_SECONDS)
    code = main(["claim", str(model), "--region", "x=1:1.5", "--expect", "doomed",
                 "--max-depth", "5", "--out", str(tmp_path / "c"), "--quiet"])
    out = capsys.readouterr().out
    assert code == 0
    assert "in K" not in out and "every start of the region within the limits" in out
    t = float(re.search(r"cross a limit by t = ([0-9.e+-]+) s\b", out).group(1))
    assert t >= math.log(3) - 1e-9  # the last start, x0 = 1.5, crosses at ln 3 (closed form)


def test_points_name_the_states(capsys):
    assert main(["points", str(FERMENTER), "--max-depth", "8"]) == 0
    out = capsys.readouterr().out
    # the saddle of the fermenter lies at s = (3 + sqrt 5)/2 (models/fermenter.toml)
    assert f"s = {(3 + math.sqrt(5)) / 2:.10g}, x = " in out
    assert " x [" not in out and re.search(r"\d x \d", out) is None


def test_safe_loss_gate_warns_without_safe_region(decay_out, tmp_path, capsys):
    # every start of the decay model crosses its floor: OLD has no safe region to lose
    code = main(["diff", str(decay_out), str(decay_out), "--fail-on", "safe-loss",
                 "--out", str(tmp_path)])
    assert code == 0
    assert "OLD proves no start safe" in _one_line(capsys.readouterr().err)


def test_second_interrupt_says_what_was_written(tmp_path, capsys, monkeypatch):
    import certify.plots

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt
    monkeypatch.setattr(certify.plots, "save_figures", interrupted)
    code = main(["prove", str(DECAY), "--max-depth", "2", "--out", str(tmp_path), "--quiet"])
    err = _one_line(capsys.readouterr().err)
    assert code == 130
    assert "written: certificate.json.gz, summary.json;" in err
    assert "not written (older copies may remain): map.png, time_to_limit.png" in err


# -- model sections and free text (items 13, 18) --------------------------------------------

def test_limits_section_reads_like_constraints():
    from certify import parse_model

    new = parse_model(DECAY_SECONDS.replace("[constraints]", "[limits]"))
    old = parse_model(DECAY_SECONDS)
    assert [(c.name, c.g) for c in new.constraints] == [(c.name, c.g) for c in old.constraints]
    # the domain conditions of the limits are found under the same keys either way, so
    # that the prover's and the checker's programs can be built (x' = -x crosses 0.5 from
    # x0 = 1 at ln 2: closed form)
    assert set(new.conditions) == set(old.conditions)
    from certify.claim import check_claim

    result = check_claim(new, {"x": (1, 1.5)}, "stays", until=0.5, max_depth=6)
    assert result.verdict == "proven"


@pytest.mark.parametrize("text, message", [
    (DECAY_SECONDS.replace("[constraints]", "[limits]") + '[constraints]\nc = "x <= 9"\n',
     "[limits] and [constraints] are the same section"),
    (DECAY_SECONDS.replace("[constraints]", "[limts]"), "did you mean [limits]?"),
    (DECAY_SECONDS.replace("[constraints]", "[limits]").replace('"x >= 0.5"', '"y >= 0.5"'),
     "[limits] floor: column 1: unknown name 'y'"),
])
def test_limits_section_messages(text, message):
    from certify import ModelError, parse_model

    with pytest.raises(ModelError, match=re.escape(message)):
        parse_model(text)


@pytest.mark.parametrize("field, where, old", [
    ("name", "[model] name", 'name = "decay in seconds"'),
    ("time_unit", "[model] time_unit", 'time_unit = "s"'),
    ("unit", "[states] x: unit", "x = [1, 4]"),
])
def test_free_text_is_capped(field, where, old):
    from certify import ModelError, parse_model
    from certify.model import TEXT_LENGTHS

    def with_text(n):
        value = "w" * n
        new = f'x = {{ range = [1, 4], unit = "{value}" }}' if field == "unit" \
            else f'{field} = "{value}"'
        return DECAY_SECONDS.replace(old, new)

    parse_model(with_text(TEXT_LENGTHS[field]))
    n = TEXT_LENGTHS[field] + 1
    with pytest.raises(ModelError, match=re.escape(f"{where}: is {n:,} characters long; at most")):
        parse_model(with_text(n))


def test_revised_model_wording(tmp_path, capsys):
    # x' = x (1 - x) - h: with h = 0.16 the lower equilibrium is 0.2, with h = 0.24 it is
    # 0.4 (roots of x^2 - x + h, closed form): stocks between them were safe and now
    # decline, so some stored safe claims cannot be re-verified
    logistic = DATA / "prove_logistic_harvest.toml"
    out = tmp_path / "old"
    assert main(["prove", str(logistic), "--max-depth", "5", "--out", str(out), "--quiet"]) == 0
    revised = tmp_path / "revised.toml"
    revised.write_text(logistic.read_text().replace("h = 0.16", "h = 0.24"))
    code = main(["check", str(out), "--model", str(revised), "--workers", "1", "--quiet"])
    text = capsys.readouterr().out
    assert code == 1
    assert "claims not re-verified with the stored steps:" in text
    assert "safe" in text.split("claims not re-verified with the stored steps:")[1]
    assert "claims that fail" not in text


def test_the_progress_bar_names_a_starting_round_and_rounds_down():
    # a round of a 4D model can run for minutes: the bar says which one is flowing, and
    # 99.996 % decided reads 99.9 %, not 100.0 % (common practice: never overstate)
    from certify.commands.prove import progress_bar

    bar = progress_bar()
    bar.starting(3, 4096)
    assert bar.bar.desc.startswith("round 3, 4096 cells: flowing")
    bar(3, 4096, 0.99996, 12.0)
    assert bar.bar.n == 99.9 and bar.bar.desc.startswith("round 3, 4096 cells")
    bar(4, 4100, 1.0, 13.0)
    assert bar.bar.n == 100.0
    bar.close()


@pytest.mark.parametrize("argv, command, unknown", [
    (["prove", str(FERMENTER), "-o", "out"], "prove", "-o out"),
    (["check", "-x", "cert.json.gz"], "check", "-x"),
])
def test_an_unknown_option_is_named_with_its_command_usage(argv, command, unknown, capsys):
    # common practice (argparse): the usage shown is the command's, which lists what it takes
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert f"usage: certify {command}" in err
    assert f"certify {command}: error: unrecognized arguments: {unknown}" in err
