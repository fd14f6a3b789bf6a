"""Turn the plain values of a configuration file into typed objects, section by section.

Cross-references (boards named by channels, gate members, duplicate wiring) are checked
afterwards by :mod:`meshwarden.config.checks`, once every section has been read.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

from meshwarden.config import fields as f
from meshwarden.config.driver_options import driver_options
from meshwarden.config.model import (
    ACTUATOR_KINDS,
    WATCHDOG_ACTIONS,
    ActuatorConfig,
    BoardConfig,
    ChipConfig,
    ClientKey,
    Config,
    GateConfig,
    JournalConfig,
    LatticeConfig,
    MarginOverride,
    MonitorConfig,
    RackConfig,
    SafetyConfig,
    ScansConfig,
    ScpiOptions,
    ServiceConfig,
    WatchdogConfig,
)
from meshwarden.config.source import PathKey
from meshwarden.units import AMPERES, AMPS_PER_WATT, HERTZ, OHMS, RADIANS, SECONDS, VOLTS

TOP_KEYS = ("rack", "chip", "calibration", "safety", "service", "journal", "simulator", "scans")
BOARD_KEYS = (
    "id",
    "url",
    "driver",
    "address",
    "outputs",
    "monitor_inputs",
    "dac_bits",
    "full_scale_volts",
    "adc_bits",
    "monitor_gains_ohms",
    "watchdog",
    "timeout_s",
    "retries",
    "error_rate_limit",
    "baud_rate",
    "options",
    "interlock",
)
ACTUATOR_KEYS = ("id", "kind", "output", "limit_volts", "pull_in_volts", "step_limit_volts", "dwell_s", "calibration")
ACTUATOR_DEFAULT_KEYS = ("limit_volts", "pull_in_volts", "step_limit_volts", "dwell_s")
MONITOR_KEYS = ("id", "input", "responsivity_a_per_w", "transimpedance_ohms", "dark_current_a")
MONITOR_DEFAULT_KEYS = ("responsivity_a_per_w", "transimpedance_ohms", "dark_current_a")

VOLTS_FIELD = f.quantity(VOLTS)
SECONDS_FIELD = f.quantity(SECONDS)
OHMS_FIELD = f.quantity(OHMS)


def _gains(value: Any) -> tuple[float, ...]:
    if not isinstance(value, list) or not value:
        raise ValueError("expected a non-empty list of transimpedance gains")
    return tuple(OHMS_FIELD(v) for v in value)


def _board(p: f.Problems, path: PathKey, raw: Any) -> BoardConfig | None:
    s = f.Section(p, raw, path, BOARD_KEYS, what="board")
    w = s.sub("watchdog", ("timeout_s", "action"))
    defaults = BoardConfig(id="", url="")
    board: dict[str, Any] = dict(
        id=s.get("id", f.identifier),
        url=s.get("url", f.url_in(p.directory((*path, "url")))),
        driver=s.get("driver", f.identifier, defaults.driver),
        address=s.get("address", f.integer(1, 254), defaults.address),
        outputs=s.get("outputs", f.integer(1, 1024), defaults.outputs),
        monitor_inputs=s.get("monitor_inputs", f.integer(0, 1024), defaults.monitor_inputs),
        dac_bits=s.get("dac_bits", f.integer(8, 16), defaults.dac_bits),
        full_scale_volts=s.get("full_scale_volts", f.quantity(VOLTS, maximum=1000.0), defaults.full_scale_volts),
        adc_bits=s.get("adc_bits", f.integer(8, 24), defaults.adc_bits),
        monitor_gains_ohms=s.get("monitor_gains_ohms", _gains, defaults.monitor_gains_ohms),
        watchdog=WatchdogConfig(
            timeout_s=w.get("timeout_s", f.quantity(SECONDS, maximum=3600.0), defaults.watchdog.timeout_s),
            action=w.get("action", f.choice(*WATCHDOG_ACTIONS), defaults.watchdog.action),  # type: ignore[arg-type]
        ),
        timeout_s=s.get("timeout_s", f.quantity(SECONDS, maximum=60.0), defaults.timeout_s),
        retries=s.get("retries", f.integer(0, 10), defaults.retries),
        error_rate_limit=s.get("error_rate_limit", f.fraction, defaults.error_rate_limit),
        baud_rate=s.get("baud_rate", f.integer(1200, 12_000_000), defaults.baud_rate),
        interlock=s.get("interlock", f.boolean, defaults.interlock),
    )
    if board["driver"] is not f.BAD and s.ok:
        board["options"] = driver_options(p, (*path, "options"), board["driver"], s.value.get("options"))
        options = board["options"]
        if board["interlock"] is True and isinstance(options, ScpiOptions) and options.interlock_query is None:
            p.add((*path, "interlock"), "an interlock needs a way to read it: options.interlock_query is null")
    if any(v is f.BAD for v in board.values()) or f.BAD in (board["watchdog"].timeout_s, board["watchdog"].action):
        return None
    return BoardConfig(**board)


def _defaults(s: f.Section, key: str, groups: tuple[str, ...], converters: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Per-group default values (e.g. per actuator kind), converted once so a bad one is reported once."""
    top = s.sub(key, groups)
    out: dict[str, dict[str, Any]] = {}
    for group in groups:
        g = top.sub(group, converters)
        out[group] = {k: g.get(k, conv) for k, conv in converters.items() if k in g.value}
    return out


def _actuators(s: f.Section, calibration_dir: Path | None) -> list[ActuatorConfig]:
    converters = {
        "limit_volts": VOLTS_FIELD,
        "pull_in_volts": VOLTS_FIELD,
        "step_limit_volts": VOLTS_FIELD,
        "dwell_s": f.quantity(SECONDS, positive=False, maximum=60.0),
    }
    before = len(s.problems.issues)
    defaults = _defaults(s, "actuator_defaults", ACTUATOR_KINDS, converters)
    # A mistake in the defaults is reported once, on its own line, not again as a missing key of
    # every actuator that would have inherited the value.
    defaults_broken = len(s.problems.issues) > before
    out = []
    for path, raw in s.items("actuators"):
        a = f.Section(s.problems, raw, path, ACTUATOR_KEYS, what="actuator")
        kind = a.get("kind", f.choice(*ACTUATOR_KINDS))
        group = defaults.get(kind, {}) if kind is not f.BAD else {}
        values: dict[str, Any] = dict(
            id=a.get("id", f.identifier),
            kind=kind,
            output=a.get("output", f.terminal),
        )
        for key, conv in converters.items():
            if key not in a.value and key not in group and defaults_broken:
                values[key] = f.BAD  # already reported on the defaults line
            elif kind is not f.BAD or key in a.value:
                values[key] = a.get(key, conv, group.get(key, f.MISSING))
            else:
                values[key] = f.BAD
        if "calibration" in a.value:
            values["calibration"] = a.get("calibration", f.path_in(s.problems.directory((*path, "calibration"))))
        elif calibration_dir is not None and values["id"] is not f.BAD:
            values["calibration"] = calibration_dir / f"{values['id']}.yaml"
        else:
            if calibration_dir is None and a.ok:
                s.problems.add(path, "no calibration file: set calibration.directory or this actuator's calibration")
            values["calibration"] = f.BAD
        if a.ok and all(v is not f.BAD for v in values.values()):
            out.append(ActuatorConfig(**values))
    return out


def _gates(s: f.Section) -> list[GateConfig]:
    out = []
    for path, raw in s.items("gates"):
        g = f.Section(s.problems, raw, path, ("id", "coupler", "phase"), what="gate")
        values: dict[str, Any] = dict(
            id=g.get("id", f.identifier), coupler=g.get("coupler", f.identifier), phase=g.get("phase", f.identifier)
        )
        if g.ok and f.BAD not in values.values():
            out.append(GateConfig(**values))
    return out


def _lattice(s: f.Section, gates: set[str], monitors: set[str]) -> LatticeConfig | None:
    """``chip.lattice``: modes, columns of {gate: top mode}, taps {monitor: [after, mode]}, input modes."""
    if s.value.get("lattice") is None:
        return None
    lat = s.sub("lattice", ("modes", "columns", "taps", "input_modes"))
    modes = lat.get("modes", f.integer(2, 4096))
    if not lat.ok or modes is f.BAD:
        return None
    problems = s.problems
    columns: list[tuple[tuple[str, int], ...]] = []
    placed: set[str] = set()
    for path, raw in lat.items("columns"):
        if not isinstance(raw, dict):
            problems.add(path, "expected a mapping of gate id to its top mode")
            continue
        used: set[int] = set()
        column = []
        for gate, top in raw.items():
            where = (*path, str(gate))
            if gate not in gates:
                problems.add(where, f"no gate '{gate}' in chip.gates")
            elif gate in placed:
                problems.add(where, f"gate '{gate}' is placed twice in the lattice")
            if isinstance(top, bool) or not isinstance(top, int) or not 0 <= top < modes - 1:
                problems.add(where, f"top mode must be a whole number from 0 to {modes - 2}, got {top!r}")
                continue
            if top in used or top - 1 in used or top + 1 in used:
                problems.add(where, f"gate '{gate}' overlaps another gate of this column (modes {top}, {top + 1})")
            used.add(top)
            placed.add(str(gate))
            column.append((str(gate), top))
        columns.append(tuple(column))
    taps: list[tuple[str, int, int]] = []
    raw_taps = lat.value.get("taps") or {}
    if not isinstance(raw_taps, dict):
        problems.add((*lat.path, "taps"), "expected a mapping of monitor id to [after column, mode]")
        raw_taps = {}
    for monitor, spot in raw_taps.items():
        where = (*lat.path, "taps", str(monitor))
        if monitor not in monitors:
            problems.add(where, f"no monitor '{monitor}' in chip.monitors")
        whole = isinstance(spot, list) and all(isinstance(v, int) and not isinstance(v, bool) for v in spot)
        ok = whole and len(spot) == 2
        if not ok or not -1 <= spot[0] < len(columns) or not 0 <= spot[1] < modes:
            problems.add(where, f"expected [after column -1..{len(columns) - 1}, mode 0..{modes - 1}], got {spot!r}")
            continue
        taps.append((str(monitor), spot[0], spot[1]))
    inputs = lat.value.get("input_modes", [0])
    if (
        not isinstance(inputs, list)
        or not inputs
        or any(isinstance(v, bool) or not isinstance(v, int) or not 0 <= v < modes for v in inputs)
    ):
        problems.add((*lat.path, "input_modes"), f"expected a list of modes 0..{modes - 1}, got {inputs!r}")
        inputs = [0]
    return LatticeConfig(modes, tuple(columns), tuple(taps), tuple(int(v) for v in inputs))


def _monitors(s: f.Section) -> list[MonitorConfig]:
    converters = {
        "responsivity_a_per_w": f.quantity(AMPS_PER_WATT, maximum=10.0),
        "transimpedance_ohms": OHMS_FIELD,
        "dark_current_a": f.quantity(AMPERES, positive=False, minimum=0.0, maximum=1e-3),
    }
    optional = {"dark_current_a": 0.0}
    defaults = _defaults(s, "monitor_defaults", ("all",), converters)["all"]
    out = []
    for path, raw in s.items("monitors"):
        m = f.Section(s.problems, raw, path, MONITOR_KEYS, what="monitor")
        values: dict[str, Any] = dict(id=m.get("id", f.identifier), input=m.get("input", f.terminal))
        for key, conv in converters.items():
            values[key] = m.get(key, conv, defaults.get(key, optional.get(key, f.MISSING)))
        if m.ok and f.BAD not in values.values():
            out.append(MonitorConfig(**values))
    return out


def _service(p: f.Problems, raw: Any) -> ServiceConfig:
    s = f.Section(
        p,
        raw,
        ("service",),
        (
            "bind",
            "pub",
            "max_message_bytes",
            "reply_cache_bytes",
            "telemetry_rate_hz",
            "server_secret_key_file",
            "clients",
        ),
    )
    d = ServiceConfig()
    clients = []
    for path, item in s.items("clients"):
        c = f.Section(p, item, path, ("name", "public_key_file", "role"), what="client")
        values: dict[str, Any] = dict(
            name=c.get("name", f.identifier),
            public_key_file=c.get("public_key_file", f.path_in(p.directory((*path, "public_key_file")))),
            role=c.get("role", f.choice("observer", "operator", "admin")),
        )
        if c.ok and f.BAD not in values.values():
            clients.append(ClientKey(**values))
    secret = s.get("server_secret_key_file", f.path_in(p.directory(("service", "server_secret_key_file"))), None)
    return ServiceConfig(
        bind=s.get("bind", f.endpoint, d.bind),
        pub=s.get("pub", f.endpoint, d.pub),
        max_message_bytes=s.get("max_message_bytes", f.integer(1024, 64 << 20), d.max_message_bytes),
        reply_cache_bytes=s.get("reply_cache_bytes", f.integer(1 << 20, 1 << 32), d.reply_cache_bytes),
        telemetry_rate_hz=s.get("telemetry_rate_hz", f.quantity(HERTZ, maximum=1000.0), d.telemetry_rate_hz),
        server_secret_key_file=secret,
        clients=tuple(clients),
    )


SCAN_KEYS = (
    "every_s",
    "at",
    "targets",
    "directory",
    "test_volts",
    "max_step_volts",
    "kappa_step",
    "phase_step_rad",
    "rest_frames",
    "optical_noise_rel",
    "sense_noise_volts",
    "k_sigma",
    "second_look_factor",
    "integration_s",
    "temperature_k",
    "dark_current_a",
    "false_alarm",
    "crosstalk_share_max",
    "loss_floor",
    "path_loss_db_max",
    "look_max_step_volts",
)


def _time_of_day(value: Any) -> str:
    if not isinstance(value, str) or not re.fullmatch(r"([01]\d|2[0-3]):[0-5]\d", value):
        raise ValueError(f'expected a time of day HH:MM such as "02:30", got {value!r}')
    return value


def _sigmas(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 1.0 <= float(value) <= 100.0:
        raise ValueError(f"expected a number of standard deviations from 1 to 100, got {value!r}")
    return float(value)


def _look_factor(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 1.0 <= float(value) <= 1000.0:
        raise ValueError(f"expected how many times the first step a second look takes, from 1 to 1000, got {value!r}")
    return float(value)


def _kelvin(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 1.0 <= float(value) <= 1000.0:
        raise ValueError(f"expected the detectors' temperature in kelvin, from 1 to 1000, got {value!r}")
    return float(value)


def _false_alarm(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0.0 < float(value) <= 0.01:
        raise ValueError(f"expected a false-alarm probability above 0 and at most 0.01, got {value!r}")
    return float(value)


def _share(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0.0 <= float(value) <= 0.5:
        raise ValueError(f"expected a share of a neighbour's drive from 0 to 0.5, got {value!r}")
    return float(value)


def _loss_floor(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0.0 < float(value) <= 1.0:
        raise ValueError(
            f"expected the least share of conserved light a tap receives, above 0 and at most 1, got {value!r}"
        )
    return float(value)


def _loss_db(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0.0 <= float(value) <= 3.0:
        raise ValueError(f"expected how many dB two taps' paths may differ in loss, from 0 to 3, got {value!r}")
    return float(value)


def _scans(p: f.Problems, raw: Any, known: set[str]) -> ScansConfig:
    s = f.Section(p, raw, ("scans",), SCAN_KEYS)
    d = ScansConfig()
    if s.value.get("every_s") is not None and s.value.get("at") is not None:
        p.add(("scans",), "give 'every_s' (a period) or 'at' (a time of day), not both")
    targets = []
    for path, item in s.items("targets"):
        if not isinstance(item, str) or item not in known:
            p.add(path, f"{item!r} is not an actuator or gate of the chip")
        else:
            targets.append(item)
    directory = s.get("directory", f.path_in(p.directory(("scans", "directory"))), None)
    return ScansConfig(
        every_s=s.get("every_s", f.quantity(SECONDS), None),
        at=s.get("at", _time_of_day, None),
        targets=tuple(targets),
        directory=directory,
        test_volts=s.get("test_volts", f.quantity(VOLTS), d.test_volts),
        max_step_volts=s.get("max_step_volts", f.quantity(VOLTS), d.max_step_volts),
        kappa_step=s.get("kappa_step", f.fraction, d.kappa_step),
        phase_step_rad=s.get("phase_step_rad", f.quantity(RADIANS), d.phase_step_rad),
        rest_frames=s.get("rest_frames", f.integer(3, 1000), d.rest_frames),
        optical_noise_rel=s.get("optical_noise_rel", f.fraction, d.optical_noise_rel),
        sense_noise_volts=s.get("sense_noise_volts", f.quantity(VOLTS), d.sense_noise_volts),
        k_sigma=s.get("k_sigma", _sigmas, d.k_sigma),
        second_look_factor=s.get("second_look_factor", _look_factor, d.second_look_factor),
        integration_s=s.get("integration_s", f.quantity(SECONDS, maximum=10.0), d.integration_s),
        temperature_k=s.get("temperature_k", _kelvin, d.temperature_k),
        dark_current_a=s.get(
            "dark_current_a", f.quantity(AMPERES, positive=False, minimum=0.0, maximum=1e-3), d.dark_current_a
        ),
        false_alarm=s.get("false_alarm", _false_alarm, d.false_alarm),
        crosstalk_share_max=s.get("crosstalk_share_max", _share, d.crosstalk_share_max),
        loss_floor=s.get("loss_floor", _loss_floor, d.loss_floor),
        path_loss_db_max=s.get("path_loss_db_max", _loss_db, d.path_loss_db_max),
        look_max_step_volts=s.get("look_max_step_volts", f.quantity(VOLTS), d.look_max_step_volts),
    )


def build_config(p: f.Problems, raw: Any, source: Path) -> Config | None:
    """Read every section; return the config, or None when a problem was recorded."""
    top = f.Section(p, raw, (), TOP_KEYS, what="configuration")
    if not top.ok:
        return None
    for key in ("rack", "chip", "journal"):
        if key not in top.value:
            p.add((), f"missing required section '{key}'")
    rack = top.sub("rack", ("boards",))
    boards = [b for b in (_board(p, path, item) for path, item in rack.items("boards")) if b is not None]
    if "rack" in top.value and rack.ok and not rack.items("boards"):
        p.add(("rack", "boards"), "the rack needs at least one board")

    cal = top.sub("calibration", ("directory",))
    cal_dir = cal.get("directory", f.path_in(p.directory(("calibration", "directory"))), None)
    chip = top.sub("chip", ("actuator_defaults", "actuators", "gates", "monitor_defaults", "monitors", "lattice"))
    actuators = _actuators(chip, None if cal_dir is f.BAD else cal_dir)
    gates = _gates(chip)
    monitors = _monitors(chip)
    lattice = _lattice(chip, {g.id for g in gates}, {m.id for m in monitors})
    if "chip" in top.value and chip.ok and not chip.items("actuators"):
        p.add(("chip", "actuators"), "the chip needs at least one actuator")

    safety = top.sub("safety", ("pull_in_margin", "margin_override", "interlock_poll_s"))
    margin = safety.get("pull_in_margin", f.fraction, SafetyConfig().pull_in_margin)
    override = None
    if "margin_override" in safety.value:
        o = safety.sub("margin_override", ("measured_pull_in", "reason"))
        measured, reason = o.get("measured_pull_in", f.text), o.get("reason", f.text)
        if o.ok and f.BAD not in (measured, reason):
            override = MarginOverride(measured, reason)
    poll_s = safety.get("interlock_poll_s", f.quantity(SECONDS, maximum=1.0), SafetyConfig().interlock_poll_s)
    journal = top.sub("journal", ("path",))
    journal_path = journal.get("path", f.path_in(p.directory(("journal", "path"))))
    service = _service(p, top.value.get("service"))
    known_targets = {a.id for a in actuators} | {g.id for g in gates}
    scans = _scans(p, top.value.get("scans"), known_targets)
    if "simulator" in top.value and not isinstance(top.value["simulator"], dict):
        p.add(("simulator",), "expected a mapping (read only by the simulator)")

    if p.issues:
        return None
    return Config(
        rack=RackConfig(tuple(boards)),
        chip=ChipConfig(tuple(actuators), tuple(gates), tuple(monitors), lattice),
        journal=JournalConfig(journal_path),
        safety=SafetyConfig(margin, override, poll_s),
        service=service,
        scans=scans,
        source=source,
    )
