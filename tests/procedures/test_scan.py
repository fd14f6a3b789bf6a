"""The fault scan on the simulated bench: faults found and classed, outputs left where they were."""

from __future__ import annotations

import asyncio
import copy
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from meshsim import inprocess
from meshsim.faults import Fault
from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.errors import StoppedRefused
from meshwarden.procedures.lattice import LatticeTopology
from meshwarden.procedures.scan_attribution import amplitude_of, angle_step, estimate_share, least_sigmas
from meshwarden.procedures.scan_paths import (
    conservation_cone,
    expected_effect,
    gate_setting,
    incoherent_powers,
    lit_monitors,
    neighbours,
    sight,
    swing_taps,
    unmixed,
    upstream_of,
)
from meshwarden.procedures.scan_run import ScanControl, ScanSettings, run_scan
from meshwarden.procedures.verdicts import conserved_light_check
from meshwarden.writelog import check_board_log
from tests.procedures.scan_bench import BLOCKS, OPERATING_POINT, bench_topology, write_scan_bench
from tests.procedures.scan_demo_draws import run_demo_draws
from tests.procedures.scan_draws import Draw, problems, run_draws, scan_one

# Exact SI values (2019 redefinition): Source: BIPM, The International System of Units, 9th ed.
ELEMENTARY_CHARGE_C = 1.602176634e-19
BOLTZMANN_J_PER_K = 1.380649e-23


def _scan(tmp_path: Path, faults: list[Fault] | None = None, **kwargs: Any) -> tuple[dict[str, Any], list[str]]:
    return asyncio.run(scan_one(tmp_path, Draw(faults or [])) if not kwargs else _custom(tmp_path, faults, **kwargs))


async def _custom(
    tmp_path: Path,
    faults: list[Fault] | None,
    point: dict[str, float] | None = None,
    within_gate_crosstalk: float = 0.0,
    measured_tables: bool = False,
    **kwargs: Any,
) -> tuple[dict[str, Any], list[str]]:
    path, rack = write_scan_bench(tmp_path)
    if measured_tables:  # the bench has no fabrication spread: its design tables are exactly its chip's
        for table in (tmp_path / "cal").glob("*.yaml"):
            text = table.read_text(encoding="utf-8")
            table.write_text(text.replace("origin: design-nominal", "origin: measured"), encoding="utf-8")
    if within_gate_crosstalk:  # the simulated chip's crosstalk, unknown to the daemon
        text = path.read_text(encoding="utf-8")
        path.write_text(text.replace("within_gate_fraction: 0.0", f"within_gate_fraction: {within_gate_crosstalk}"))
    config = load_config(path)
    try:
        async with open_controller(config) as ctl:
            await ctl.arm()
            await ctl.set(point or OPERATING_POINT)
            for fault in faults or []:
                inprocess.get(rack).inject(fault)
            report = await run_scan(ctl, owner="scan:test", **kwargs)
            log = list(inprocess.get(rack).board("b0").write_log)
            return report, [str(v) for v in check_board_log(config, "b0", log).violations]
    finally:
        inprocess.remove(rack)


def test_random_faults_are_found_and_classed_right() -> None:
    """Over random draws of actuator and monitor faults, every judgeable fault gets its class and no healthy part
    is flagged, within rules 1-3, outputs back where they began, in at most 2.2 monitor frames per actuator (1.2 for
    the design and its rest frames, plus four per group of second looks where a response or a monitor is in doubt;
    the issue allows 3)."""
    # a seed picked once and never adjusted; the longer run is `python -m tests.procedures.scan_draws`
    result = run_draws(8, seed=31337)
    assert result["failures"] == []
    assert result["found"] > result["draws"]  # most injected faults were judgeable, and found
    assert result["frames_per_actuator"] <= 2.2


def test_demo_chip_draws_flag_no_healthy_part_and_pass_no_stuck_one() -> None:
    """On the demo chip (static phases, crosstalk, drift, dim taps) a few random draws flag no healthy part, find
    every driver fault and dead lit monitor, and call no stuck actuator ok."""
    # a seed picked once and never adjusted; the longer run is `python -m tests.procedures.scan_demo_draws`
    result = run_demo_draws(3, seed=8128)
    assert result["problems"] == []
    assert result["frames"] <= 3 * result["actuators"]


@pytest.mark.parametrize("share", [0.02, 0.04])
def test_a_stuck_coupler_is_not_credited_with_what_crosstalk_moved(tmp_path: Path, share: float) -> None:
    """A stuck coupler's drive still pulls the phase shifter beside it (a share of its V^2, below the configured
    bound of 0.05), which moves the light at the monitors both see: that response is not the coupler's, and the
    coupler is never called ok for it."""
    report, issues = asyncio.run(
        _custom(tmp_path, [Fault("stuck", "a0c")], within_gate_crosstalk=share, topology=bench_topology())
    )
    assert issues == []
    verdict = report["actuators"]["a0c"]
    assert verdict["verdict"] in ("no_response", "unobservable"), verdict
    assert report["actuators"]["a0p"]["verdict"] == "ok"


def _level(verdict: dict[str, Any]) -> float:
    evidence = verdict["evidence"]
    return float(evidence.get("lit_mean_a", evidence.get("dark_mean_a")))


def test_a_healthy_output_at_an_interference_null_is_not_called_dead(tmp_path: Path) -> None:
    """Two 50:50 couplers and no phase difference send all the light to one output of the interferometer (standard
    Mach-Zehnder algebra): the other reads its dark level, yet it is healthy, and moving the coupler before it shows
    so."""
    point = OPERATING_POINT | {"a0.kappa": 0.5, "b0.kappa": 0.5, "a0.phase": 0.0}
    report, issues = asyncio.run(_custom(tmp_path, [], point=point, topology=bench_topology()))
    assert issues == []
    dark = min(("o0t", "o0b"), key=lambda m: _level(report["monitors"][m]))
    assert report["monitors"][dark]["verdict"] == "ok", report["monitors"][dark]
    assert report["monitors"][dark]["evidence"]["look_change_a"] != 0.0  # its coupler's move reached it


def test_a_dead_output_is_found_by_what_its_partner_gained(tmp_path: Path) -> None:
    """A dead output of a lit interferometer is dead because the coupler before it moved light its partner lost or
    gained and it did not follow (a lossless coupler conserves power)."""
    report, issues = asyncio.run(_custom(tmp_path, [Fault("dead_monitor", "o2b")], topology=bench_topology()))
    assert issues == []
    verdict = report["monitors"]["o2b"]
    assert verdict["verdict"] == "dead", verdict
    assert verdict["evidence"]["look_least_expected_a"] > 2 * verdict["evidence"]["look_uncertainty_a"]


def test_conserved_light_check_cases() -> None:
    """A reading that changed is alive; one that stayed put while the others' total moved by far more than both
    uncertainties is missed (at least half the conserved share must arrive: 0.5 x (10 - 1) nW x 0.9 A/W = 4.05 nA);
    too little moved light leaves it untestable."""
    common = {"own_uncertainty_a": 1e-9, "others_uncertainty_w": 1e-9, "responsivity_a_per_w": 0.9}
    state, evidence = conserved_light_check(own_change_a=0.0, others_change_w=10e-9, **common)
    assert state == "missed"
    assert evidence["look_least_expected_a"] == pytest.approx(4.05e-9)
    assert conserved_light_check(own_change_a=-5e-9, others_change_w=10e-9, **common)[0] == "moved"
    assert conserved_light_check(own_change_a=0.0, others_change_w=4e-9, **common)[0] == "untestable"


def _demo_topology() -> LatticeTopology:
    folder = Path(__file__).resolve().parents[2] / "config" / "demo"
    sim = yaml.safe_load((folder / "simulator.yaml").read_text(encoding="utf-8"))
    lattice = sim["lattice"]
    return LatticeTopology.from_lattice(
        lattice["modes"], lattice["columns"], lattice["taps"], sim["laser"]["input_modes"]
    )


def _tap_powers(
    topology: LatticeTopology, kappas: dict[str, float], phases: dict[str, float], light: Any
) -> dict[str, float]:
    """Coherent fields through the lattice, each gate the standard unitary coupler [[sqrt(1-k), i sqrt(k)],
    [i sqrt(k), sqrt(1-k)]] followed by a phase on its top arm, from the input fields ``light``."""
    field = np.array(light, dtype=complex)
    out = {m: float(abs(field[mode]) ** 2) for m, (after, mode) in topology.taps.items() if after == -1}
    for column in range(topology.columns):
        for gate, (col, top) in topology.gates.items():
            if col != column:
                continue
            k = kappas[gate]
            matrix = np.array([[math.sqrt(1 - k), 1j * math.sqrt(k)], [1j * math.sqrt(k), math.sqrt(1 - k)]])
            field[top : top + 2] = matrix @ field[top : top + 2]
            field[top] *= np.exp(1j * phases[gate])
        out |= {m: float(abs(field[mode]) ** 2) for m, (after, mode) in topology.taps.items() if after == column}
    return out


def test_conservation_cones_hold_in_a_coherent_field_model() -> None:
    """Moving the coupler a cone names changes the light at the cone's taps by amounts that add up to zero, and
    changes no tap of that column outside it, at random settings of the demo lattice (fields through unitary
    couplers, computed here with numpy: a unitary matrix conserves power)."""
    topology = _demo_topology()
    rng = np.random.default_rng(5)
    for monitor in ("m20", "m32", "m38", "m40", "m05"):
        for depth in (0, 1):
            cone = conservation_cone(topology, monitor, depth)
            assert cone.gate and not cone.reason and monitor in cone.monitors
            kappas = {g: float(rng.uniform(0.1, 0.9)) for g in topology.gates}
            phases = {g: float(rng.uniform(0, 2 * np.pi)) for g in topology.gates}
            light = rng.normal(size=topology.modes) + 1j * rng.normal(size=topology.modes)  # light in every mode
            before = _tap_powers(topology, kappas, phases, light)
            after = _tap_powers(topology, kappas | {cone.gate: kappas[cone.gate] + 0.07}, phases, light)
            column = topology.taps[monitor][0]
            changed = {m for m, (a, _) in topology.taps.items() if a == column and abs(after[m] - before[m]) > 1e-12}
            assert changed <= cone.monitors
            assert sum(after[m] - before[m] for m in cone.monitors) == pytest.approx(0.0, abs=1e-12)
            assert any(abs(after[m] - before[m]) > 1e-6 for m in cone.monitors)


def test_swing_taps_hold_every_tap_a_phase_can_move_light_to() -> None:
    """A phase shifter moves light only among the taps its swing set names (the coherent field model above)."""
    topology = _demo_topology()
    rng = np.random.default_rng(6)
    kappas = {g: float(rng.uniform(0.1, 0.9)) for g in topology.gates}
    phases = {g: float(rng.uniform(0, 2 * np.pi)) for g in topology.gates}
    for gate in ("g16", "g38", "g47"):
        taps = swing_taps(topology, dict(kappas), gate, "phase", 7)
        assert taps
        light = rng.normal(size=topology.modes) + 1j * rng.normal(size=topology.modes)
        before = _tap_powers(topology, kappas, phases, light)
        after = _tap_powers(topology, kappas, phases | {gate: phases[gate] + 0.3}, light)
        changed = {m for m, (a, _) in topology.taps.items() if a == 7 and abs(after[m] - before[m]) > 1e-12}
        assert changed and changed <= taps
        assert sum(after[m] - before[m] for m in taps) == pytest.approx(0.0, abs=1e-12)


def test_neighbours_are_the_gate_partner_and_like_actuators_beside_it() -> None:
    """On the bench the coupler of a1 sits beside its own phase shifter and the couplers of a0 and a2."""
    assert neighbours(bench_topology(), "a1", "kappa") == [("a1", "phase"), ("a0", "kappa"), ("a2", "kappa")]
    assert neighbours(bench_topology(), "b0", "phase") == [("b0", "kappa"), ("b1", "phase")]


def test_one_step_has_a_blind_operating_point_two_sizes_do_not() -> None:
    """cos(theta + d) = cos(theta) at theta = -d/2 (standard trigonometry): one step can show nothing at all; steps
    of +d and -d leave at least A (1 - cos d) (the smaller of 2 A sin(d/2) |sin(theta +- d/2)| is least at
    theta = 0)."""
    assert least_sigmas(1.0, [(0.3, 0.0, 1.0)]) == pytest.approx(0.0, abs=1e-3)
    assert least_sigmas(1.0, [(0.3, 0.0, 1.0), (-0.3, 0.0, 1.0)]) == pytest.approx(1 - math.cos(0.3), rel=1e-3)
    assert least_sigmas(1.0, [(0.3, 0.0, 1.0), (0.15, 0.0, 1.0)]) > 0.005


def test_crosstalk_share_is_recovered_from_monitors_only_a_neighbour_sees() -> None:
    """Synthetic responses with a known share f = 0.02 (r_j = f dV_j^2 r_n / dV_n^2 plus noise) give back f within
    three standard errors (weighted least squares through the origin)."""
    rng = np.random.default_rng(3)
    actuators, monitors = 40, 30
    dv2 = [float(v) for v in rng.uniform(-8.0, -2.0, size=actuators)]
    responses = np.zeros((actuators, monitors))
    se = np.full((actuators, monitors), 1e-10)
    pairs = []
    for j in range(0, actuators, 2):
        n, k = j + 1, j % monitors
        responses[n, k] = rng.uniform(5e-9, 5e-8)
        responses[j, k] = 0.02 * dv2[j] * responses[n, k] / dv2[n] + rng.normal(0.0, 1e-10)
        pairs.append((j, n, k))
    estimate = estimate_share(responses, se, dv2, pairs, 5.0)
    assert estimate is not None and estimate.samples == actuators // 2
    assert abs(estimate.share - 0.02) < 3 * estimate.share_se
    assert estimate.upper(5.0) > 0.02


def test_healthy_bench_is_all_ok_except_the_invisible_phases(tmp_path: Path) -> None:
    """A healthy chip: every actuator ok but the phases after the last coupler (unobservable, with a reason)."""
    report, issues = _scan(tmp_path)
    assert issues == []
    for aid, verdict in report["actuators"].items():
        wanted = "unobservable" if aid.startswith("b") and aid.endswith("p") else "ok"
        assert verdict["verdict"] == wanted, (aid, verdict)
    assert report["actuators"]["b0p"]["reason"].startswith("the phase of b0 meets no other light")
    assert {v["verdict"] for v in report["monitors"].values()} == {"ok"}
    assert report["outputs_restored"] is True
    # 15 observable actuators: an S-matrix of order 15 plus its rest frame (Harwit & Sloane 1979), + 8 rest frames
    assert report["frames"] == 16 + 8


def test_noise_limit_is_the_detector_noise_of_the_formulas(tmp_path: Path) -> None:
    """The noise limit a lit monitor is judged by equals sigma sqrt(chi2_{1-a}(n-1)/(n-1)) with sigma from shot,
    feedback-resistor and ADC quantisation noise and the allowance for wandering light, recomputed here from the
    published formulas."""
    report, _ = _scan(tmp_path)
    evidence = report["monitors"]["o0b"]["evidence"]
    level = evidence["lit_mean_a"]
    bandwidth = 1.0 / (2 * 1e-3)  # integrate-and-dump over T: B = 1/(2T) (standard)
    lsb = 2.5 / 2**16 / 100e3  # the simulated ADC's 2.5 V full scale, 16 bits, 100 kOhm
    shot = 2 * ELEMENTARY_CHARGE_C * level * bandwidth  # Source: Schottky shot noise 2qIB
    johnson = 4 * BOLTZMANN_J_PER_K * 300.0 * bandwidth / 100e3  # Source: Johnson 1928; Nyquist 1928
    quantisation = lsb**2 / 12  # Source: Kester, Analog Devices MT-001
    wander = (0.01 * level) ** 2  # scans.optical_noise_rel: 1 % of the light (drift, laser noise; common practice)
    sigma = math.sqrt(shot + johnson + quantisation + wander)
    # 8 rest frames: chi-square with 7 degrees of freedom, whose tail for odd nu is
    # Q(x) = erfc(sqrt(x/2)) + sqrt(2/pi) e^(-x/2) (x^(1/2) + x^(3/2)/3 + x^(5/2)/15) (Abramowitz & Stegun 26.4.5);
    # solve Q(x) = 1e-6 by bisection
    low, high = 0.0, 200.0
    for _ in range(200):
        mid = (low + high) / 2
        series = math.sqrt(mid) + mid**1.5 / 3 + mid**2.5 / 15
        tail = math.erfc(math.sqrt(mid / 2)) + math.sqrt(2 / math.pi) * math.exp(-mid / 2) * series
        low, high = (mid, high) if tail > 1e-6 else (low, mid)
    assert evidence["lit_std_limit_a"] == pytest.approx(sigma * math.sqrt(low / 7), rel=1e-6)
    # the dark taps are judged by the detector alone (no light to wander): shot of nothing but thermal and ADC
    dark = report["monitors"]["d0"]["evidence"]
    dark_sigma = math.sqrt(2 * ELEMENTARY_CHARGE_C * dark["dark_mean_a"] * bandwidth + johnson + quantisation)
    assert dark["dark_std_limit_a"] == pytest.approx(dark_sigma * math.sqrt(low / 7), rel=1e-6)


def test_without_topology_a_stuck_actuator_is_unobservable_never_ok(tmp_path: Path) -> None:
    """Without the lattice topology the scan cannot tell stuck from unseen, and says so instead of ok."""
    report, issues = _scan(tmp_path, [Fault("stuck", "a1p")], topology=None)
    assert issues == []
    verdict = report["actuators"]["a1p"]
    assert verdict["verdict"] == "unobservable"
    assert "without the lattice topology" in verdict["reason"]
    assert report["actuators"]["a1c"]["verdict"] == "ok"  # it responds: the drive and the optics work


def test_driver_faults_are_found_on_unobservable_actuators_too(tmp_path: Path) -> None:
    """The sense check covers actuators no monitor sees: a dead output stage there is a driver fault."""
    report, _ = _scan(tmp_path, [Fault("dead_channel", "b0:7")], topology=bench_topology())
    assert report["actuators"]["b1p"]["verdict"] == "driver_fault"


def test_a_stopped_scan_returns_the_outputs(tmp_path: Path) -> None:
    """A stop between frames ends the scan with a stopped refusal after every output went back."""
    control = ScanControl()

    def progress(done: int, total: int) -> None:
        if done == 12:  # within the design frames: outputs have moved
            control.stop("cancelled by a client")

    async def scenario() -> tuple[dict[str, int], dict[str, int], int]:
        path, rack = write_scan_bench(tmp_path)
        config = load_config(path)
        try:
            async with open_controller(config) as ctl:
                await ctl.arm()
                await ctl.set(OPERATING_POINT)
                before = {a: int(ctl.describe(a)["code"]) for a in ctl.actuators}
                writes = len(inprocess.get(rack).board("b0").write_log)
                with pytest.raises(StoppedRefused, match="returned"):
                    await run_scan(ctl, owner="scan:t", topology=bench_topology(), control=control, progress=progress)
                board = inprocess.get(rack).board("b0")
                after = {a: int(board.codes[ctl.actuators[a].config.output.index]) for a in ctl.actuators}
                return before, after, len(board.write_log) - writes
        finally:
            inprocess.remove(rack)

    before, after, writes = asyncio.run(scenario())
    assert writes > 0
    assert after == before


def test_a_scan_ended_by_a_disarm_says_the_disarm_took_the_outputs(tmp_path: Path) -> None:
    """A disarm during the frames ends the scan with a stopped refusal that says the disarm took the outputs over
    (not that the scan returned them), and at the board every output ends at zero within the rules."""
    pending: list[asyncio.Future[None]] = []

    async def scenario() -> tuple[StoppedRefused, dict[str, int], list[Any]]:
        path, rack = write_scan_bench(tmp_path)
        config = load_config(path)
        try:
            async with open_controller(config) as ctl:
                await ctl.arm()
                await ctl.set(OPERATING_POINT)

                def progress(done: int, total: int) -> None:
                    if done == 12 and not pending:  # within the design frames: outputs have moved
                        pending.append(asyncio.ensure_future(ctl.disarm()))

                with pytest.raises(StoppedRefused) as caught:
                    await run_scan(ctl, owner="scan:t", topology=bench_topology(), progress=progress)
                await pending[0]
                board = inprocess.get(rack).board("b0")
                after = {a: int(board.codes[ctl.actuators[a].config.output.index]) for a in ctl.actuators}
                issues = check_board_log(config, "b0", list(board.write_log)).violations
                return caught.value, after, list(issues)
        finally:
            inprocess.remove(rack)

    error, after, issues = asyncio.run(scenario())
    assert "disarm took the outputs over" in error.message
    assert "returned to where it found them" not in error.message
    assert error.details["outputs_returned"] is False
    assert set(after.values()) == {0}
    assert issues == []


def test_steps_stay_below_the_test_voltage(tmp_path: Path) -> None:
    """From an operating point of 0 V a step goes up, never past the configured test voltage."""

    async def scenario() -> list[Any]:
        path, rack = write_scan_bench(tmp_path)
        config = load_config(path)
        try:
            async with open_controller(config) as ctl:
                await ctl.arm()
                await run_scan(ctl, ["a0"], owner="scan:t", settings=ScanSettings(test_volts=1.0))
                return list(inprocess.get(rack).board("b0").write_log)
        finally:
            inprocess.remove(rack)

    log = asyncio.run(scenario())
    lsb = 60.0 / 2**16
    writes = [v for _, kind, _, values in log if kind == "write" for v in values]
    assert writes and max(writes) * lsb <= 1.0


@pytest.mark.parametrize(
    ("kappa", "setting"), [(None, "split"), (0.0, "bar"), (0.01, "bar"), (0.5, "split"), (0.995, "cross")]
)
def test_gate_settings(kappa: float | None, setting: str) -> None:
    """A coupler near 0 passes light straight, near 1 swaps it, else splits (unknown: split)."""
    assert gate_setting(kappa) == setting


def test_observability_rules_on_the_bench() -> None:
    """Couplers are seen by the monitors after them, a phase only before a splitting coupler; dark taps are unlit."""
    topology = bench_topology()
    split = {g: "split" for g in topology.gates}
    assert sight(topology, split, "a0", "kappa").monitors == {"o0t", "o0b"}
    assert sight(topology, split, "a0", "phase").monitors == {"o0t", "o0b"}
    assert sight(topology, split, "b0", "phase").monitors == frozenset()
    # gate b set to bar: the phase of a no longer meets other light in a splitting coupler
    assert sight(topology, split | {"b0": "bar"}, "a0", "phase").reason.startswith("the phase of a0")
    # gate a set to bar: only mode 0 is lit, gate b still splits it, so its coupler is seen
    assert sight(topology, split | {"a0": "bar"}, "b0", "kappa").monitors == {"o0t", "o0b"}
    assert lit_monitors(topology, split) == {f"o{i}{s}" for i in range(BLOCKS) for s in "tb"}
    assert upstream_of(topology, split, "a0", "kappa", "a0", "phase")
    assert upstream_of(topology, split, "a0", "phase", "b0", "kappa")
    assert not upstream_of(topology, split, "a1", "kappa", "b0", "kappa")


def test_problems_notices_a_missed_fault() -> None:
    """The draw checker itself fails a report that calls a stuck actuator ok (so the random test can fail)."""
    d = Draw([Fault("stuck", "a0c")], actuator_faults={"a0c": "stuck"})
    report = {"actuators": {"a0c": {"verdict": "ok", "reason": ""}}, "monitors": {}}
    assert problems(d, report) == ["a0c (stuck): ok (), wanted ['no_response']"]


def test_power_summed_light_follows_the_coupler_rule() -> None:
    """Light summed in power: a coupler of ratio kappa sends 1 - kappa straight and kappa across (the standard
    directional-coupler power split), so after kappa_a = 0.3 and kappa_b = 0.6 a unit input on the top mode
    gives 0.7 x 0.4 + 0.3 x 0.6 = 0.46 on top and 0.54 below; the unlit mode's input tap reads nothing."""
    topology = bench_topology()
    kappas: dict[str, float | None] = {f"a{i}": 0.3 for i in range(BLOCKS)} | {f"b{i}": 0.6 for i in range(BLOCKS)}
    powers = incoherent_powers(topology, kappas)
    assert powers["o0t"] == pytest.approx(0.46)
    assert powers["o0b"] == pytest.approx(0.54)
    assert powers["d0"] == 0.0


def test_expected_phase_effect_is_the_interferometer_fringe_slope() -> None:
    """A Mach-Zehnder's output P(phi) = P_a (1-k) + P_b k - 2 sqrt(k (1-k) P_a P_b) cos(phi) (standard two-beam
    interference) has a largest slope 2 sqrt(k (1-k) P_a P_b); the estimate for the phase of gate a0 is that slope
    (with P_a = 0.7, P_b = 0.3 after a 0.3 coupler, k = 0.6) times the power-summed transfer to the tap."""
    topology = bench_topology()
    kappas: dict[str, float | None] = {f"a{i}": 0.3 for i in range(BLOCKS)} | {f"b{i}": 0.6 for i in range(BLOCKS)}
    pa, pb, k = 0.7, 0.3, 0.6
    phis = np.linspace(0.0, 2 * np.pi, 20001)
    fringe = pa * (1 - k) + pb * k - 2 * np.sqrt(k * (1 - k) * pa * pb) * np.cos(phis)
    steepest = float(np.max(np.abs(np.gradient(fringe, phis))))
    effect = expected_effect(topology, kappas, "a0", "phase")
    assert effect["o0t"] == pytest.approx(steepest, rel=1e-6)  # the tap right after the coupler: transfer 1
    assert effect["o1t"] == 0.0  # another interferometer's tap
    assert expected_effect(topology, kappas, "b0", "phase") == {}  # after the last coupler: nothing to see


def test_a_response_far_from_the_previous_scan_at_the_same_point_is_drifted(tmp_path: Path) -> None:
    """Against an earlier report at the same codes, an actuator that responds as before stays ok, one whose
    response is now half of what it was is drifted; at other codes no comparison is made."""

    async def scenario() -> tuple[dict[str, Any], dict[str, Any], dict[str, Any]]:
        path, rack = write_scan_bench(tmp_path)
        config = load_config(path)
        try:
            async with open_controller(config) as ctl:
                await ctl.arm()
                await ctl.set(OPERATING_POINT)
                first = await run_scan(ctl, owner="scan:t", topology=bench_topology())
                doctored = copy.deepcopy(first)
                doctored["actuators"]["a2p"]["evidence"]["response"] *= 2.0  # as if it once moved twice as much
                again = await run_scan(ctl, owner="scan:t", topology=bench_topology(), reference=doctored)
                await ctl.set({"a3.kappa": 0.35})
                elsewhere = await run_scan(ctl, owner="scan:t", topology=bench_topology(), reference=doctored)
                return first, again, elsewhere
        finally:
            inprocess.remove(rack)

    first, again, elsewhere = asyncio.run(scenario())
    assert again["compared_with_reference"] is True
    assert again["actuators"]["a2p"]["verdict"] == "drifted"
    assert again["actuators"]["a2p"]["evidence"]["predicted"] == pytest.approx(
        2.0 * first["actuators"]["a2p"]["evidence"]["response"]
    )
    others = {a: v["verdict"] for a, v in again["actuators"].items() if a != "a2p"}
    assert others == {a: v["verdict"] for a, v in first["actuators"].items() if a != "a2p"}
    assert elsewhere["compared_with_reference"] is False
    assert elsewhere["actuators"]["a2p"]["verdict"] == "ok"


def test_actuators_on_a_board_that_cannot_be_used_are_untested(tmp_path: Path) -> None:
    """An actuator whose board is faulted is reported untested, never ok, and nothing is written to it."""

    async def scenario() -> tuple[dict[str, Any], int]:
        path, rack = write_scan_bench(tmp_path)
        config = load_config(path)
        try:
            async with open_controller(config) as ctl:
                await ctl.arm()
                await ctl.set(OPERATING_POINT)
                writes = len(inprocess.get(rack).board("b0").write_log)
                ctl.boards["b0"].faulted = True  # as the heartbeat marks a board whose link failed
                report = await run_scan(ctl, owner="scan:t", topology=bench_topology())
                return report, len(inprocess.get(rack).board("b0").write_log) - writes
        finally:
            inprocess.remove(rack)

    report, writes = asyncio.run(scenario())
    assert {v["verdict"] for v in report["actuators"].values()} == {"untested"}
    assert report["actuators"]["a0c"]["reason"] == "its board cannot be read"
    assert writes == 0


def _mode_powers(topology: LatticeTopology, kappas: dict[str, float], phases: dict[str, float], before: int) -> Any:
    """Power in every mode before column ``before`` (the coherent field model above, light in the input modes)."""
    field = np.zeros(topology.modes, dtype=complex)
    field[list(topology.input_modes)] = 1.0
    for column in range(before):
        for gate, (col, top) in topology.gates.items():
            if col == column:
                k = kappas[gate]
                matrix = np.array([[math.sqrt(1 - k), 1j * math.sqrt(k)], [1j * math.sqrt(k), math.sqrt(1 - k)]])
                field[top : top + 2] = matrix @ field[top : top + 2]
                field[top] *= np.exp(1j * phases[gate])
    return np.abs(field) ** 2


@pytest.mark.parametrize(
    ("gate", "attribute", "mixer", "expected"),
    [
        ("g15", "kappa", "g15", True),
        ("g23", "kappa", "g23", False),
        ("g00", "phase", "g15", True),
        ("g38", "phase", "g45", False),
    ],
)
def test_unmixed_light_does_not_depend_on_any_phase(gate: str, attribute: str, mixer: str, expected: bool) -> None:
    """Where the scan calls the light at a coupler unmixed, the power on its inputs stays put whatever every phase
    of the demo lattice is (a gate with one lit input splits power by its ratio alone); where light has interfered
    it moves with the phases (coherent field model above, light entering mode 0 only)."""
    topology = _demo_topology()
    split = {g: "split" for g in topology.gates}
    assert unmixed(topology, split, gate, attribute) is expected
    column, top = topology.gates[mixer]
    rng = np.random.default_rng(8)
    kappas = {g: float(rng.uniform(0.2, 0.8)) for g in topology.gates}
    seen = [
        _mode_powers(topology, kappas, {g: float(rng.uniform(0, 2 * np.pi)) for g in topology.gates}, column)[
            [top, top + 1]
        ]
        for _ in range(5)
    ]
    spread = float(np.ptp(np.array(seen), axis=0).max())
    assert (spread < 1e-12) is expected


def test_both_dead_outputs_of_a_known_interferometer_are_found(tmp_path: Path) -> None:
    """Both outputs of an interferometer fed straight from the input read dark: the light entering its second
    coupler is known (no interference before it), so a working output would have held it at rest or gained it when
    that coupler turned; neither did, and both are dead."""
    faults = [Fault("dead_monitor", "o1t"), Fault("dead_monitor", "o1b")]
    report, issues = asyncio.run(_custom(tmp_path, faults, topology=bench_topology()))
    assert issues == []
    assert report["monitors"]["o1t"]["verdict"] == "dead", report["monitors"]["o1t"]
    assert report["monitors"]["o1b"]["verdict"] == "dead", report["monitors"]["o1b"]
    assert report["monitors"]["o0t"]["verdict"] == "ok"


def test_a_coupling_step_is_a_turn_of_the_coupled_mode_angle() -> None:
    """kappa = sin^2(C L) (Yariv 1973): with theta = 2 C L, a small change of kappa is sqrt(kappa (1 - kappa)) times
    the change of theta (checked here by a central difference of the published formula), so a kappa step of 0.01
    at kappa = 0.3 turns the fringe by 0.01 / sqrt(0.21) rad."""
    theta = 2 * math.asin(math.sqrt(0.3))
    h = 1e-6
    slope = (math.sin((theta + h) / 2) ** 2 - math.sin((theta - h) / 2) ** 2) / (2 * h)
    assert angle_step("kappa", 0.01, 0.3) == pytest.approx(0.01 / slope, rel=1e-6)
    assert angle_step("phase", 0.01, None) == 0.01
    assert amplitude_of("kappa", 2.0, 0.3) == pytest.approx(2.0 * slope, rel=1e-6)
