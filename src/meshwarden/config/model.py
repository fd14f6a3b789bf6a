"""The configuration as immutable typed objects.

Everything here is already validated: a :class:`Config` only exists when every reference
resolves, every channel is used once and every limit sits below the board's full scale and the
actuator's pull-in margin. Units are SI and in the field names. Objects are frozen so that a
running daemon can hand them to threads and jobs without copies.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

ActuatorKind = Literal["phase", "coupler"]
WatchdogAction = Literal["hold", "ramp_to_zero"]

ACTUATOR_KINDS: tuple[ActuatorKind, ...] = ("phase", "coupler")
WATCHDOG_ACTIONS: tuple[WatchdogAction, ...] = ("hold", "ramp_to_zero")


@dataclass(frozen=True, order=True)
class Terminal:
    """One numbered terminal of one board: an output channel or a monitor input (``b0:12``)."""

    board: str
    index: int

    def __str__(self) -> str:
        return f"{self.board}:{self.index}"


@dataclass(frozen=True)
class WatchdogConfig:
    """What a board does on its own when the daemon's heartbeats stop.

    The default ramps outputs to zero after 30 s: long enough for a restarted daemon to adopt
    the outputs without a jump, short enough that a dead host does not leave high voltage on the
    chip overnight.
    """

    timeout_s: float = 30.0
    action: WatchdogAction = "ramp_to_zero"


TERMINATIONS = {"lf": "\n", "crlf": "\r\n", "cr": "\r"}


@dataclass(frozen=True)
class ScpiOptions:
    """How a board speaking SCPI (driver ``scpi``) is commanded: command templates with
    ``{channel}``, ``{input}``, ``{volts}``, ``{integration_s}``, ``{ohms}``, ``{timeout_s}``,
    ``{action}`` placeholders; a template set to null means the instrument has no such command.
    See docs/drivers.md."""

    write_termination: str = "lf"
    read_termination: str = "lf"
    channel_base: int = 1  # the number the instrument gives output 0 (SCPI instruments count from 1)
    units_per_line: int = 64  # program message units joined with ';' in one line at most
    identify: str = "*IDN?"
    expect_model: str | None = None  # the model field *IDN? must report, if set
    set_volts: str = "SOUR{channel}:VOLT {volts}"
    query_volts: str = "SOUR{channel}:VOLT?"
    set_limit: str | None = "SOUR{channel}:VOLT:LIM {volts}"
    output_on: str | None = "OUTP{channel} ON"
    output_off: str | None = "OUTP{channel} OFF"
    query_output: str | None = "OUTP{channel}?"
    read_sense: str | None = "MEAS{channel}:VOLT?"
    read_input: str | None = "INP{input}:CURR? {integration_s}"
    set_gain: str | None = "INP{input}:GAIN {ohms}"
    error_query: str = "SYST:ERR?"
    event_status: str = "*ESR?"
    clear_status: str = "*CLS"
    interlock_query: str | None = "SYST:INT?"
    watchdog: str | None = "SYST:WDOG {timeout_s},{action}"
    watchdog_query: str | None = "SYST:WDOG:TRIP?"
    watchdog_words: tuple[str, str, str] = ("OFF", "HOLD", "ZERO")  # off, hold, ramp_to_zero
    reset: str = "*RST"
    allow_reset: bool = False
    adc_full_scale_volts: float = 2.5


@dataclass(frozen=True)
class BoardConfig:
    """One high-voltage DAC driver board in the rack."""

    id: str
    url: str
    driver: str = "reference"
    address: int = 1
    outputs: int = 64
    monitor_inputs: int = 32
    dac_bits: int = 16
    full_scale_volts: float = 60.0
    adc_bits: int = 16
    monitor_gains_ohms: tuple[float, ...] = (1e3, 1e4, 1e5, 1e6)
    watchdog: WatchdogConfig = WatchdogConfig()
    timeout_s: float = 0.5
    retries: int = 3
    error_rate_limit: float = 0.25
    baud_rate: int = 115200
    options: Any = None  # the driver's own options: ScpiOptions for scpi, a mapping for others
    interlock: bool = False  # the board has an interlock input the daemon watches


@dataclass(frozen=True)
class RackConfig:
    """The boards, in the order the configuration lists them."""

    boards: tuple[BoardConfig, ...]

    def board(self, board_id: str) -> BoardConfig:
        for board in self.boards:
            if board.id == board_id:
                return board
        raise KeyError(board_id)


@dataclass(frozen=True)
class ActuatorConfig:
    """One MEMS actuator: what it moves, where it is wired and how hard it may be driven.

    ``pull_in_volts`` is the static electrostatic instability voltage (parallel plates) or the
    lateral snap voltage (comb drives): the actuator snaps and may stick above it.
    ``limit_volts`` is the operator's own ceiling; the guard uses the least of it, the board's
    full scale and ``(1 - margin) * pull_in_volts``.
    """

    id: str
    kind: ActuatorKind
    output: Terminal
    limit_volts: float
    pull_in_volts: float
    step_limit_volts: float
    dwell_s: float
    calibration: Path


@dataclass(frozen=True)
class GateConfig:
    """A lattice gate: a tunable coupler paired with a phase shifter."""

    id: str
    coupler: str
    phase: str


@dataclass(frozen=True)
class MonitorConfig:
    """A photodetector tap read through a board's monitor input and transimpedance amplifier."""

    id: str
    input: Terminal
    responsivity_a_per_w: float
    transimpedance_ohms: float
    dark_current_a: float = 0.0  # the detector's dark current (datasheet or a dark frame); 0: none subtracted


@dataclass(frozen=True)
class LatticeConfig:
    """Where the gates and monitor taps sit in the chip's lattice, and where the light enters.

    A gate at top mode k in column c is a coupler on waveguide modes k and k+1 followed by its
    phase shifter on mode k; a tap ``(after, mode)`` sees ``mode`` after column ``after`` (-1: the
    input). Procedures (calibration) use it to route light and to know what a monitor sees."""

    modes: int
    columns: tuple[tuple[tuple[str, int], ...], ...]  # per column: (gate id, top mode)
    taps: tuple[tuple[str, int, int], ...]  # (monitor id, after column, mode)
    input_modes: tuple[int, ...]


@dataclass(frozen=True)
class ChipConfig:
    """The chip under control: its actuators, gates and monitors (and, optionally, its lattice)."""

    actuators: tuple[ActuatorConfig, ...]
    gates: tuple[GateConfig, ...] = ()
    monitors: tuple[MonitorConfig, ...] = ()
    lattice: LatticeConfig | None = None

    def actuator(self, actuator_id: str) -> ActuatorConfig:
        for actuator in self.actuators:
            if actuator.id == actuator_id:
                return actuator
        raise KeyError(actuator_id)

    def by_kind(self, kind: ActuatorKind) -> Iterator[ActuatorConfig]:
        return (a for a in self.actuators if a.kind == kind)


MIN_PULL_IN_MARGIN = 0.10  # below this, a configuration must carry a margin_override
NEAR_PULL_IN_FRACTION = 0.05  # a limit within this fraction of pull-in is warned about


@dataclass(frozen=True)
class MarginOverride:
    """An explicit permission to run with a pull-in margin below :data:`MIN_PULL_IN_MARGIN`.

    It must say where the measured pull-in voltages come from (a thin margin is only defensible
    against a measurement of this chip, never against a design value); the daemon journals it at
    every start."""

    measured_pull_in: str
    reason: str


@dataclass(frozen=True)
class SafetyConfig:
    """Rules that apply to every actuator.

    ``pull_in_margin`` keeps every limit at least this fraction below pull-in: pull-in voltages
    shift with fabrication spread and dielectric charging, so the nominal value is not a line to
    walk along. A margin below :data:`MIN_PULL_IN_MARGIN` needs ``margin_override``.
    """

    pull_in_margin: float = 0.15
    margin_override: MarginOverride | None = None
    interlock_poll_s: float = 0.05  # how often every configured interlock is read


@dataclass(frozen=True)
class ClientKey:
    """A client allowed on a non-loopback bus: its CURVE public key file and its role."""

    name: str
    public_key_file: Path
    role: Literal["observer", "operator", "admin"]


@dataclass(frozen=True)
class ServiceConfig:
    """Where the daemon listens, and who may talk to it when it listens beyond loopback."""

    bind: str = "tcp://127.0.0.1:7640"
    pub: str = "tcp://127.0.0.1:7641"
    max_message_bytes: int = 1 << 20
    reply_cache_bytes: int = 32 << 20
    telemetry_rate_hz: float = 2.0
    server_secret_key_file: Path | None = None
    clients: tuple[ClientKey, ...] = ()


@dataclass(frozen=True)
class JournalConfig:
    """The SQLite journal of targets and events."""

    path: Path


@dataclass(frozen=True)
class ScansConfig:
    """Fault scans: when the daemon runs one by itself, on what, and how hard each scan pushes.

    ``every_s`` (a period) or ``at`` ("HH:MM", the host's local time of day) schedules automatic
    scans; neither means scans run only on request. ``directory`` keeps the report files
    (default: a ``scans`` folder beside the journal)."""

    every_s: float | None = None
    at: str | None = None
    targets: tuple[str, ...] = ()
    directory: Path | None = None
    test_volts: float = 10.0
    max_step_volts: float = 2.0
    kappa_step: float = 0.005
    phase_step_rad: float = 0.01
    rest_frames: int = 8
    optical_noise_rel: float = 0.01
    sense_noise_volts: float = 0.005
    k_sigma: float = 5.0
    second_look_factor: float = 30.0
    integration_s: float = 1e-3
    temperature_k: float = 300.0
    dark_current_a: float = 0.0
    false_alarm: float = 1e-6
    crosstalk_share_max: float = 0.05
    loss_floor: float = 0.5
    path_loss_db_max: float = 0.5
    look_max_step_volts: float = 10.0


@dataclass(frozen=True)
class Config:
    """The whole validated configuration. ``source`` is informative and not part of equality."""

    rack: RackConfig
    chip: ChipConfig
    journal: JournalConfig
    safety: SafetyConfig = SafetyConfig()
    service: ServiceConfig = ServiceConfig()
    scans: ScansConfig = ScansConfig()
    source: Path | None = field(default=None, compare=False)

    def hard_limit_volts(self, actuator: ActuatorConfig) -> float:
        """The ceiling no output of this actuator may pass (rule 1 of the design)."""
        board = self.rack.board(actuator.output.board)
        return min(
            board.full_scale_volts,
            actuator.limit_volts,
            (1.0 - self.safety.pull_in_margin) * actuator.pull_in_volts,
        )
