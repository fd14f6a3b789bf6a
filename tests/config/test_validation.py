"""Every configuration rule: a broken file gives exactly one located line, and nothing else."""

from __future__ import annotations

from pathlib import Path

import pytest

from meshwarden.config import load_config
from meshwarden.errors import ConfigError
from tests.config.minimal import MAIN, replace_line, write_cal, write_config

C0 = '    - {id: c0, kind: coupler, output: "b0:0", limit_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 0.002}'
P0 = '    - {id: p0, kind: phase, output: "b0:1", limit_volts: 40, pull_in_volts: 55, step_limit_volts: 4, dwell_s: 0.002}'
GATE = "    - {id: g0, coupler: c0, phase: p0}"
MON = '    - {id: m0, input: "b0:0", responsivity_a_per_w: 0.9, transimpedance_ohms: 100000}'


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def problems(text: str, tmp_path: Path) -> list[str]:
    path = write_config(tmp_path, text)
    with pytest.raises(ConfigError) as err:
        load_config(path)
    return [str(i) for i in err.value.issues]


def test_minimal_config_is_valid(tmp_path: Path) -> None:
    """The base file of these tests loads, so each failure below is caused by its one change."""
    config = load_config(write_config(tmp_path))
    assert [a.id for a in config.chip.actuators] == ["c0", "p0"]
    assert config.chip.actuator("c0").dwell_s == 0.002


def test_unknown_key_suggests_the_close_known_key(tmp_path: Path) -> None:
    """A misspelt optional key is an error naming the key it was probably meant to be."""
    text = replace_line("      full_scale_volts: 60", "      full_scale_volt: 60")
    assert problems(text, tmp_path) == [
        "config.yaml:5: rack.boards[0].full_scale_volt: unknown key 'full_scale_volt' (did you mean 'full_scale_volts'?)"
    ]


def test_unknown_top_level_section(tmp_path: Path) -> None:
    """An unknown section is reported with the section it resembles."""
    text = MAIN + "jornal: {}\n"
    assert problems(text, tmp_path) == ["config.yaml:18: jornal: unknown key 'jornal' (did you mean 'journal'?)"]


def test_wrong_type(tmp_path: Path) -> None:
    """Text where a whole number belongs."""
    text = replace_line("      full_scale_volts: 60", "      full_scale_volts: 60\n      outputs: many")
    assert problems(text, tmp_path) == [
        "config.yaml:6: rack.boards[0].outputs: expected a whole number from 1 to 1024, got 'many'"
    ]


def test_wrong_unit_dimension(tmp_path: Path) -> None:
    """A voltage given where a time belongs is refused, not read as seconds."""
    text = replace_line("dwell_s: 0.002}", "dwell_s: 2 V}")
    assert problems(text, tmp_path) == [
        "config.yaml:8: chip.actuators[0].dwell_s: unit 'V' is not a time unit (use one of: h, min, ms, ns, s, us, µs)"
    ]


def test_explicit_units_are_converted(tmp_path: Path) -> None:
    """'2 ms' for dwell_s and '40000 mV' for a limit are read in SI units."""
    text = replace_line("dwell_s: 0.002}", "dwell_s: 2 ms}")
    text = replace_line("limit_volts: 40, pull_in_volts: 50", "limit_volts: 40000 mV, pull_in_volts: 50", text)
    config = load_config(write_config(tmp_path, text))
    assert config.chip.actuator("c0").dwell_s == pytest.approx(0.002)
    assert config.chip.actuator("c0").limit_volts == pytest.approx(40.0)


def test_not_a_number_is_refused(tmp_path: Path) -> None:
    """NaN compares false against every limit, so it must never get in."""
    text = replace_line("limit_volts: 40, pull_in_volts: 50", "limit_volts: .nan, pull_in_volts: 50")
    assert problems(text, tmp_path) == [
        "config.yaml:8: chip.actuators[0].limit_volts: expected a finite voltage, got nan"
    ]


def test_missing_required_key(tmp_path: Path) -> None:
    """A board without a url cannot be reached; the message names the missing key."""
    text = replace_line("      url: socket://127.0.0.1:9\n", "")
    assert problems(text, tmp_path) == ["config.yaml:3: rack.boards[0]: missing required key 'url'"]


def test_output_channel_used_twice(tmp_path: Path) -> None:
    """Two actuators on one output would drive both with one voltage."""
    text = replace_line('output: "b0:1"', 'output: "b0:0"')
    assert problems(text, tmp_path) == [
        "config.yaml:9: chip.actuators[1].output: output b0:0 is already wired to actuator 'c0'"
    ]


def test_monitor_input_used_twice(tmp_path: Path) -> None:
    """Two monitors on one input would read the same light; the second is refused."""
    text = replace_line(MON, MON + "\n" + MON.replace("m0", "m1"))
    assert problems(text, tmp_path) == [
        "config.yaml:14: chip.monitors[1].input: monitor input b0:0 is already used by monitor 'm0'"
    ]


def test_output_beyond_the_board(tmp_path: Path) -> None:
    """A channel number past the board's outputs is refused with the valid range."""
    text = replace_line('output: "b0:1"', 'output: "b0:64"')
    assert problems(text, tmp_path) == [
        "config.yaml:9: chip.actuators[1].output: board 'b0' has outputs 0 to 63, not 64"
    ]


def test_reference_to_missing_board(tmp_path: Path) -> None:
    """An actuator wired to a board that does not exist is refused, naming a close board id."""
    text = replace_line('output: "b0:1"', 'output: "b9:1"')
    assert problems(text, tmp_path) == [
        "config.yaml:9: chip.actuators[1].output: board 'b9' does not exist (did you mean 'b0'?)"
    ]


def test_reference_to_missing_actuator(tmp_path: Path) -> None:
    """A gate naming an actuator that does not exist is refused, naming a close id."""
    text = replace_line(GATE, "    - {id: g0, coupler: c0, phase: p9}")
    assert problems(text, tmp_path) == [
        "config.yaml:11: chip.gates[0].phase: actuator 'p9' does not exist (did you mean 'p0'?)"
    ]


def test_reference_to_missing_monitor_board(tmp_path: Path) -> None:
    """A monitor on a board that does not exist is refused."""
    text = replace_line('input: "b0:0"', 'input: "bx:0"')
    assert problems(text, tmp_path) == [
        "config.yaml:13: chip.monitors[0].input: board 'bx' does not exist (did you mean 'b0'?)"
    ]


def test_limit_above_full_scale(tmp_path: Path) -> None:
    """A limit above what the board can output is refused, once per actuator."""
    text = replace_line("      full_scale_volts: 60", "      full_scale_volts: 30")
    assert problems(text, tmp_path) == [
        "config.yaml:8: chip.actuators[0].limit_volts: limit 40 V is above board 'b0' full scale 30 V",
        "config.yaml:9: chip.actuators[1].limit_volts: limit 40 V is above board 'b0' full scale 30 V",
    ]


def test_limit_too_close_to_pull_in(tmp_path: Path) -> None:
    """With the default 0.15 margin, a 44 V limit on a 50 V pull-in actuator is refused."""
    text = replace_line("limit_volts: 40, pull_in_volts: 50", "limit_volts: 44, pull_in_volts: 50")
    assert problems(text, tmp_path) == [
        "config.yaml:8: chip.actuators[0].limit_volts: limit 44 V is above 42.5 V, "
        "the pull-in voltage 50 V less the 0.15 safety margin"
    ]


def test_gate_member_of_the_wrong_kind(tmp_path: Path) -> None:
    """A gate's coupler must be a coupler and its phase shifter a phase shifter."""
    text = replace_line(GATE, "    - {id: g0, coupler: p0, phase: c0}")
    assert problems(text, tmp_path) == [
        "config.yaml:11: chip.gates[0].coupler: actuator 'p0' is a phase, but a gate's coupler must be a coupler",
        "config.yaml:11: chip.gates[0].phase: actuator 'c0' is a coupler, but a gate's phase must be a phase",
    ]


def test_duplicate_actuator_id(tmp_path: Path) -> None:
    """Ids are unique across actuators, gates and monitors."""
    text = replace_line(P0, P0.replace("id: p0", "id: c0"))
    lines = problems(text, tmp_path)
    assert lines[0] == "config.yaml:9: chip.actuators[1].id: duplicate id 'c0' (already used at chip.actuators[0].id)"


def test_duplicate_board_id(tmp_path: Path) -> None:
    """Two boards with one id are refused."""
    text = replace_line(
        "      full_scale_volts: 60\n",
        "      full_scale_volts: 60\n    - id: b0\n      url: socket://127.0.0.1:10\n",
    )
    assert problems(text, tmp_path) == [
        "config.yaml:6: rack.boards[1].id: duplicate board id 'b0' (first used at index 0)"
    ]


def test_yaml_syntax_error(tmp_path: Path) -> None:
    """A YAML syntax error is one line at the place the parser gave up."""
    text = replace_line("  gates:", "  gates: [")
    assert problems(text, tmp_path) == [
        "config.yaml:11: <top>: YAML syntax error: expected the node content, but found '-'"
    ]


def test_missing_include(tmp_path: Path) -> None:
    """A missing included file is reported at the line of the !include."""
    text = MAIN.replace("journal:\n  path: journal.sqlite\n", "journal: !include nowhere.yaml\n")
    assert problems(text, tmp_path) == ["config.yaml:16: journal: file not found: nowhere.yaml"]


def test_include_cycle(tmp_path: Path) -> None:
    """Files that include each other are reported with the whole chain."""
    (tmp_path / "a.yaml").write_text("path: !include b.yaml\n", encoding="utf-8")
    (tmp_path / "b.yaml").write_text("x: !include a.yaml\n", encoding="utf-8")
    text = MAIN.replace("journal:\n  path: journal.sqlite\n", "journal: !include a.yaml\n")
    assert problems(text, tmp_path) == [
        "b.yaml:1: journal.path.x: include cycle: config.yaml -> a.yaml -> b.yaml -> a.yaml"
    ]


def test_include_is_resolved_and_located(tmp_path: Path) -> None:
    """Errors inside an included file point into that file."""
    (tmp_path / "rack.yaml").write_text(
        "boards:\n  - id: b0\n    url: socket://127.0.0.1:9\n    dac_bits: 40\n", encoding="utf-8"
    )
    text = MAIN.replace(MAIN[: MAIN.index("chip:")], "rack: !include rack.yaml\n")
    assert problems(text, tmp_path) == ["rack.yaml:4: rack.boards[0].dac_bits: 40 is out of range (allowed 8 to 16)"]


def test_transimpedance_must_be_a_board_gain(tmp_path: Path) -> None:
    """A monitor's gain must be one the board can select."""
    text = replace_line("transimpedance_ohms: 100000", "transimpedance_ohms: 50 kohm")
    assert problems(text, tmp_path) == [
        "config.yaml:13: chip.monitors[0].transimpedance_ohms: 50000 ohm is not a gain of board 'b0' "
        "(it has: 1000, 10000, 100000, 1e+06)"
    ]


def test_calibration_for_another_actuator(tmp_path: Path) -> None:
    """A calibration file written for another actuator is refused."""
    path = write_config(tmp_path)
    write_cal(tmp_path / "cal", "c0", "coupler").write_text(
        (tmp_path / "cal" / "c0.yaml").read_text().replace("actuator: c0", "actuator: c1")
    )
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert [str(i) for i in err.value.issues] == [
        "config.yaml:8: chip.actuators[0].calibration: c0.yaml is the calibration of 'c1', not 'c0'"
    ]


def test_calibration_not_monotone(tmp_path: Path) -> None:
    """A calibration table that is not strictly monotone cannot be inverted and is refused."""
    path = write_config(tmp_path)
    write_cal(tmp_path / "cal", "p0", "phase", "[0.0, 0.5, 0.4, 3.5, 7.0]")
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert [str(i) for i in err.value.issues] == [
        "config.yaml:9: chip.actuators[1].calibration: cal/p0.yaml: values must increase strictly with volts: values[2] = 0.4 <= 0.5"
    ]


def test_missing_calibration_file(tmp_path: Path) -> None:
    """An actuator without its calibration file is refused at its line."""
    path = write_config(tmp_path)
    (tmp_path / "cal" / "p0.yaml").unlink()
    with pytest.raises(ConfigError) as err:
        load_config(path)
    (line,) = [str(i) for i in err.value.issues]
    assert line.startswith("config.yaml:9: chip.actuators[1].calibration: calibration file not found: ")


def test_bind_beyond_loopback_needs_keys(tmp_path: Path) -> None:
    """Listening beyond loopback without CURVE keys is a configuration error."""
    text = MAIN + "service:\n  bind: tcp://0.0.0.0:7640\n"
    assert problems(text, tmp_path) == [
        "config.yaml:18: service: binding beyond loopback needs server_secret_key_file and an allow-list of clients"
    ]


def test_actuator_defaults_apply_by_kind(tmp_path: Path) -> None:
    """Per-kind defaults fill what an actuator leaves out; its own value wins."""
    text = MAIN.replace(C0, '    - {id: c0, kind: coupler, output: "b0:0", limit_volts: 30}').replace(
        "  actuators:\n",
        "  actuator_defaults:\n"
        "    coupler: {limit_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 3 ms}\n"
        "  actuators:\n",
    )
    config = load_config(write_config(tmp_path, text))
    c0 = config.chip.actuator("c0")
    assert (c0.limit_volts, c0.pull_in_volts, c0.dwell_s) == (30.0, 50.0, pytest.approx(0.003))


def test_boolean_is_not_a_voltage(tmp_path: Path) -> None:
    """YAML reads 'yes' as true; a boolean must not become 1 V."""
    text = replace_line("limit_volts: 40, pull_in_volts: 50", "limit_volts: yes, pull_in_volts: 50")
    assert problems(text, tmp_path) == [
        "config.yaml:8: chip.actuators[0].limit_volts: expected a voltage in V, got a boolean"
    ]


def test_board_link_settings(tmp_path: Path) -> None:
    """Baud rate, retries and the error-rate limit are read and range-checked."""
    text = replace_line(
        "      full_scale_volts: 60", "      full_scale_volts: 60\n      baud_rate: 921600\n      error_rate_limit: 0.1"
    )
    board = load_config(write_config(tmp_path, text)).rack.boards[0]
    assert (board.baud_rate, board.error_rate_limit) == (921600, 0.1)
    bad = replace_line("      full_scale_volts: 60", "      full_scale_volts: 60\n      baud_rate: 12")
    assert problems(bad, tmp_path) == [
        "config.yaml:6: rack.boards[0].baud_rate: 12 is out of range (allowed 1200 to 12000000)"
    ]


# ---------------------------------------------------------------- daily-use checks (issue 14)

DEFAULTS_HEAD = (
    "  actuator_defaults:\n"
    "    coupler: {limit_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 2 ms}\n"
    "  actuators:\n"
)
C1 = '    - {id: c1, kind: coupler, output: "b0:2"}'


def _with_defaults(defaults_line: str) -> str:
    """MAIN with c0 and a second coupler c1 taking everything from actuator_defaults.coupler."""
    text = MAIN.replace(C0, '    - {id: c0, kind: coupler, output: "b0:0"}\n' + C1)
    return text.replace("  actuators:\n", DEFAULTS_HEAD.replace(DEFAULTS_HEAD.splitlines()[1], defaults_line), 1)


def test_pull_in_margin_below_minimum_is_refused(tmp_path: Path) -> None:
    """A margin of 0 (limit may equal pull-in) is refused, naming the minimum and the override."""
    text = MAIN + "safety:\n  pull_in_margin: 0\n"
    assert problems(text, tmp_path) == [
        "config.yaml:19: safety.pull_in_margin: a pull-in margin of 0 is below the minimum 0.1; a thinner margin "
        "needs safety.margin_override with measured_pull_in (where this chip's pull-in voltages were measured) "
        "and reason"
    ]


def test_margin_override_names_the_measured_pull_in_and_is_cautioned(tmp_path: Path) -> None:
    """With an override that names the measured pull-in, a thin margin loads, and the override and a
    limit within 5 % of pull-in are both loud cautions."""
    from meshwarden.config.cautions import cautions

    text = replace_line("limit_volts: 40, pull_in_volts: 50", "limit_volts: 48, pull_in_volts: 50") + (
        "safety:\n  pull_in_margin: 0.03\n"
        "  margin_override: {measured_pull_in: 'probe sweep of die 7: 49.8 V', reason: dynamic test}\n"
    )
    config = load_config(write_config(tmp_path, text))
    assert config.safety.margin_override is not None
    said = [str(c) for c in cautions(config)]
    assert any("measured pull-in: probe sweep of die 7: 49.8 V" in s and s.startswith("WARNING") for s in said)
    assert any("limits within 5% of pull-in: c0" in s for s in said)


def test_margin_override_without_its_measurement_is_refused(tmp_path: Path) -> None:
    """An override that does not say where the pull-in was measured is not an override."""
    text = MAIN + "safety:\n  pull_in_margin: 0.03\n  margin_override: {reason: hurry}\n"
    assert problems(text, tmp_path) == [
        "config.yaml:20: safety.margin_override: missing required key 'measured_pull_in'"
    ]


def test_one_typo_in_actuator_defaults_is_one_message(tmp_path: Path) -> None:
    """A misspelt key in actuator_defaults is reported once, not again for every actuator missing it."""
    text = _with_defaults("    coupler: {limt_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 2 ms}")
    assert problems(text, tmp_path) == [
        "config.yaml:8: chip.actuator_defaults.coupler.limt_volts: unknown key 'limt_volts' (did you mean 'limit_volts'?)"
    ]


def test_limit_from_defaults_is_blamed_on_the_defaults_line_once(tmp_path: Path) -> None:
    """A limit too close to pull-in that came from the defaults points at the defaults line, once."""
    text = _with_defaults("    coupler: {limit_volts: 45, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 2 ms}")
    assert problems(text, tmp_path) == [
        "config.yaml:8: chip.actuator_defaults.coupler.limit_volts: limit 45 V is above 42.5 V, the pull-in voltage "
        "50 V less the 0.15 safety margin (inherited by coupler actuators, first 'c0')"
    ]


def test_calibration_error_names_its_file(tmp_path: Path) -> None:
    """A broken calibration table is reported with the file it is in."""
    path = write_config(tmp_path)
    write_cal(tmp_path / "cal", "c0", "coupler", "[0.0, 0.1, 0.05, 0.6, 0.9]")
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert [str(i) for i in err.value.issues] == [
        "config.yaml:8: chip.actuators[0].calibration: cal/c0.yaml: values must increase "
        "strictly with volts: values[2] = 0.05 <= 0.1"
    ]


def test_table_ending_below_the_limit_is_a_caution(tmp_path: Path) -> None:
    """A calibration that stops at 40 V under a 42 V limit loads, with a caution naming the actuator."""
    from meshwarden.config.cautions import cautions

    text = replace_line("limit_volts: 40, pull_in_volts: 50", "limit_volts: 42, pull_in_volts: 50")
    said = [str(c) for c in cautions(load_config(write_config(tmp_path, text)))]
    assert "c0 (40 V < 42 V)" in " ".join(said)


def test_identical_bind_and_pub_is_refused(tmp_path: Path) -> None:
    """Commands and telemetry on one endpoint cannot both bind; said before the daemon tries."""
    text = MAIN + "service:\n  bind: tcp://127.0.0.1:7650\n  pub: tcp://127.0.0.1:7650\n"
    assert problems(text, tmp_path) == [
        "config.yaml:20: service.pub: the telemetry endpoint is the command endpoint (tcp://127.0.0.1:7650); "
        "give each its own"
    ]


def test_uncreatable_journal_path_is_refused(tmp_path: Path) -> None:
    """A journal below a plain file cannot be created: a configuration error, not a crash at start."""
    (tmp_path / "notes.txt").write_text("a file, not a folder", encoding="utf-8")
    text = replace_line("  path: journal.sqlite", "  path: notes.txt/journal.sqlite")
    assert problems(text, tmp_path) == [
        f"config.yaml:17: journal.path: cannot create {tmp_path / 'notes.txt' / 'journal.sqlite'}: "
        f"{tmp_path / 'notes.txt'} is not a writable folder"
    ]


@pytest.mark.parametrize(
    ("url", "message"),
    [
        ("socket://127.0.0.1", "'socket://127.0.0.1' has no port: write socket://HOST:PORT"),
        ("ttyUSB0", "'ttyUSB0' is not a device path: did you mean '/dev/ttyUSB0'?"),
    ],
)
def test_board_urls_that_cannot_work(tmp_path: Path, url: str, message: str) -> None:
    """A socket url without a port and a bare tty name are refused with the fix."""
    text = replace_line("      url: socket://127.0.0.1:9", f"      url: {url}")
    assert problems(text, tmp_path) == [f"config.yaml:4: rack.boards[0].url: {message}"]


def test_watchdog_hold_is_a_loud_caution(tmp_path: Path) -> None:
    """A board whose watchdog holds outputs gets a loud caution saying they stay live unattended."""
    from meshwarden.config.cautions import cautions

    text = replace_line("      full_scale_volts: 60", "      full_scale_volts: 60\n      watchdog: {action: hold}")
    said = [str(c) for c in cautions(load_config(write_config(tmp_path, text)))]
    assert said[0].startswith("WARNING: board 'b0' watchdog action is 'hold'")
    assert "stay at their voltage indefinitely" in said[0]


def test_the_chip_lattice_names_known_gates_and_monitors_at_places_that_exist(tmp_path: Path) -> None:
    """chip.lattice: a gate or monitor that does not exist, a top mode past the last pair and a
    tap after a column that is not there are each reported at their line."""
    lattice = (
        "  lattice:\n"
        "    modes: 2\n"
        "    columns:\n"
        "      - {g0: 0, gx: 0}\n"
        "      - {g0: 1}\n"
        "    taps: {m0: [0, 1], mz: [5, 0]}\n"
    )
    text = replace_line("  monitors:", lattice + "  monitors:")
    assert problems(text, tmp_path) == [
        "config.yaml:15: chip.lattice.columns[0].gx: no gate 'gx' in chip.gates",
        "config.yaml:15: chip.lattice.columns[0].gx: gate 'gx' overlaps another gate of this column (modes 0, 1)",
        "config.yaml:16: chip.lattice.columns[1].g0: gate 'g0' is placed twice in the lattice",
        "config.yaml:16: chip.lattice.columns[1].g0: top mode must be a whole number from 0 to 0, got 1",
        "config.yaml:17: chip.lattice.taps.mz: no monitor 'mz' in chip.monitors",
        "config.yaml:17: chip.lattice.taps.mz: expected [after column -1..1, mode 0..1], got [5, 0]",
    ]


SCPI_BOARD = "      full_scale_volts: 60\n      driver: scpi\n      options:\n"


def test_scpi_options_are_read_with_their_defaults(tmp_path: Path) -> None:
    """A scpi board's options take the defaults for what is not written; null removes a command."""
    text = replace_line(
        "      full_scale_volts: 60",
        SCPI_BOARD + "        read_termination: crlf\n        interlock_query: null\n        expect_model: HVS-32",
    )
    board = load_config(write_config(tmp_path, text)).rack.boards[0]
    assert board.options.read_termination == "crlf" and board.options.interlock_query is None
    assert board.options.expect_model == "HVS-32" and board.options.set_volts == "SOUR{channel}:VOLT {volts}"


def test_scpi_template_with_an_unknown_placeholder(tmp_path: Path) -> None:
    """A template may use only the placeholders of its command, and is told which."""
    text = replace_line("      full_scale_volts: 60", SCPI_BOARD + '        set_volts: "SOUR{chan}:VOLT {volts}"')
    assert problems(text, tmp_path) == [
        "config.yaml:8: rack.boards[0].options.set_volts: unknown placeholder {chan} "
        "(this command may use {channel}, {volts})"
    ]


def test_scpi_template_missing_its_value(tmp_path: Path) -> None:
    """A set-voltage template without {volts} would send no value: refused."""
    text = replace_line("      full_scale_volts: 60", SCPI_BOARD + '        set_volts: "SOUR{channel}:VOLT"')
    assert problems(text, tmp_path) == [
        "config.yaml:8: rack.boards[0].options.set_volts: the template must contain {volts}"
    ]


def test_scpi_required_command_cannot_be_removed(tmp_path: Path) -> None:
    """The error query is how a write is checked: it cannot be set to nothing."""
    text = replace_line("      full_scale_volts: 60", SCPI_BOARD + "        error_query: null")
    config = load_config(write_config(tmp_path, text))  # null means "the default" for a required one
    assert config.rack.boards[0].options.error_query == "SYST:ERR?"
    text = replace_line("      full_scale_volts: 60", SCPI_BOARD + '        error_query: ""')
    assert problems(text, tmp_path) == [
        "config.yaml:8: rack.boards[0].options.error_query: expected non-empty text, got text"
    ]


def test_scpi_unknown_option_and_bad_termination(tmp_path: Path) -> None:
    """A misspelt option and a termination that is not one of the known ones are both reported."""
    text = replace_line(
        "      full_scale_volts: 60", SCPI_BOARD + "        write_terminator: lf\n        read_termination: LF"
    )
    assert problems(text, tmp_path) == [
        "config.yaml:8: rack.boards[0].options.write_terminator: unknown key 'write_terminator' "
        "(did you mean 'write_termination'?)",
        "config.yaml:9: rack.boards[0].options.read_termination: expected one of lf, crlf, cr, got 'LF'",
    ]


def test_reference_driver_takes_no_options(tmp_path: Path) -> None:
    """Options on a board of the reference driver are a mistake, not silently ignored."""
    text = replace_line("      full_scale_volts: 60", "      full_scale_volts: 60\n      options: {baud: 9600}")
    assert problems(text, tmp_path) == ["config.yaml:6: rack.boards[0].options: the reference driver takes no options"]


def test_other_driver_options_are_kept_for_the_driver(tmp_path: Path) -> None:
    """A driver from another package gets its options mapping as written."""
    from meshwarden.drivers import register_driver

    register_driver("acme64", "meshwarden.testing", "RecordingDriver")  # as an entry point would
    text = replace_line(
        "      full_scale_volts: 60", "      full_scale_volts: 60\n      driver: acme64\n      options: {slot: 3}"
    )
    assert load_config(write_config(tmp_path, text)).rack.boards[0].options == {"slot": 3}


def test_interlock_flag_and_poll_interval(tmp_path: Path) -> None:
    """``interlock`` is true or false; the poll interval is a time of at most 1 s."""
    text = replace_line("      full_scale_volts: 60", "      full_scale_volts: 60\n      interlock: yes please")
    assert problems(text, tmp_path) == [
        "config.yaml:6: rack.boards[0].interlock: expected true or false, got 'yes please'"
    ]
    text = MAIN + "safety:\n  interlock_poll_s: 2 s\n"
    assert problems(text, tmp_path) == ["config.yaml:19: safety.interlock_poll_s: must be at most 1 s, got 2"]
    text = MAIN.replace("      full_scale_volts: 60", "      full_scale_volts: 60\n      interlock: true")
    config = load_config(write_config(tmp_path, text + "safety:\n  interlock_poll_s: 20 ms\n"))
    assert config.rack.boards[0].interlock and config.safety.interlock_poll_s == pytest.approx(0.02)


def test_interlock_on_a_scpi_board_needs_its_query(tmp_path: Path) -> None:
    """A watched interlock on an instrument with no interlock query could never be seen open."""
    text = replace_line(
        "      full_scale_volts: 60", SCPI_BOARD + "        interlock_query: null\n      interlock: true"
    )
    assert problems(text, tmp_path) == [
        "config.yaml:9: rack.boards[0].interlock: an interlock needs a way to read it: options.interlock_query is null"
    ]


def test_unknown_driver_is_named_with_the_known_ones(tmp_path: Path) -> None:
    """A driver name no package provides is an error at its line, with the close known name."""
    text = replace_line("      full_scale_volts: 60", "      full_scale_volts: 60\n      driver: scpii")
    (issue,) = problems(text, tmp_path)
    assert issue.startswith("config.yaml:6: rack.boards[0].driver: unknown board driver 'scpii' (known: ")
    assert issue.endswith("(did you mean 'scpi'?)") and "reference" in issue


def test_scpi_options_must_be_a_mapping(tmp_path: Path) -> None:
    """Options written as a list are reported as such, at their line."""
    text = replace_line(
        "      full_scale_volts: 60", "      full_scale_volts: 60\n      driver: scpi\n      options: [lf]"
    )
    assert problems(text, tmp_path) == [
        "config.yaml:7: rack.boards[0].options: expected a mapping for this driver's options, got a list"
    ]


def test_dark_current_is_read_with_its_unit_and_defaults_to_none(tmp_path: Path) -> None:
    """A monitor's dark current takes a unit ("5 nA" is 5e-9 A); without one nothing is subtracted."""
    assert load_config(write_config(tmp_path)).chip.monitors[0].dark_current_a == 0.0
    text = replace_line("transimpedance_ohms: 100000}", "transimpedance_ohms: 100000, dark_current_a: 5 nA}")
    config = load_config(write_config(tmp_path, text))
    assert config.chip.monitors[0].dark_current_a == pytest.approx(5e-9, rel=1e-12)


def test_negative_dark_current_is_refused(tmp_path: Path) -> None:
    """A dark current below zero is a located error."""
    text = replace_line("transimpedance_ohms: 100000}", "transimpedance_ohms: 100000, dark_current_a: -2 nA}")
    assert problems(text, tmp_path) == [
        "config.yaml:13: chip.monitors[0].dark_current_a: must be at least 0 A, got -2e-09"
    ]
