"""Benchmarks of meshwarden and its simulator; see scripts/bench.

Each figure is the median CPU time of many repetitions, and its ratio to a baseline measured in
the same run, so results from different machines can be compared by ratio.
"""

from __future__ import annotations

import argparse
import json
import platform
import statistics
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from meshwarden.testing import free_port

if TYPE_CHECKING:
    from meshsim.clock import ManualClock
    from meshsim.rack import SimRack

REPO = Path(__file__).resolve().parents[1]


def median_cpu_seconds(work: Callable[[], object], repeats: int) -> float:
    samples = []
    for _ in range(repeats):
        start = time.process_time_ns()
        work()
        samples.append((time.process_time_ns() - start) * 1e-9)
    return statistics.median(samples)


def bench_simulator(repeats: int) -> dict[str, float]:
    from meshsim.clock import ManualClock
    from meshsim.rack import SimRack

    clock = ManualClock()
    rack = SimRack.from_config(REPO / "config" / "demo.yaml", clock=clock)
    chip = rack.chip
    rng = np.random.default_rng(0)
    u = np.linalg.qr(rng.standard_normal((16, 16)) + 1j * rng.standard_normal((16, 16)))[0]
    field = np.ones(16, dtype=complex)

    def baseline() -> object:  # eight 16x16 complex matrix-vector products: the bare optics
        v = field
        for _ in range(8):
            v = u @ v
        return v

    def monitor_read() -> object:
        return rack.boards["b0"].receive(_read_monitors_frame(), rack.clock.now())

    def chip_taps() -> object:
        return chip.tap_powers_w(rack.clock.now())

    base = median_cpu_seconds(baseline, repeats)
    read = median_cpu_seconds(monitor_read, repeats)
    taps = median_cpu_seconds(chip_taps, repeats)
    write = _median_write_cpu_seconds(rack, clock, max(repeats, 1000))
    return {
        "baseline_numpy_8_matvec_us": base * 1e6,
        "sim_monitor_read_32_inputs_us": read * 1e6,
        "sim_monitor_read_ratio": read / base,
        "sim_chip_tap_powers_us": taps * 1e6,
        "sim_chip_tap_powers_ratio": taps / base,
        "sim_write_cpu_us": write * 1e6,
        "sim_write_ratio": write / base,
    }


def _median_write_cpu_seconds(rack: SimRack, clock: ManualClock, repeats: int) -> float:
    """Median CPU time of one write command that steps one output, as the daemon's ramps do: board
    b0 is brought to 20 V on every output in 2 V steps, then each write moves one output (in turn
    over all 64, couplers and phase shifters alike) 2 V up or back down, a dwell of 2 ms apart.
    The frames are built beforehand; the time is the board's: decode, execute, move the chip, reply."""
    from meshwarden.protocol import Frame, encode_frame
    from meshwarden.protocol import messages as m

    board = rack.boards["b0"]
    outputs = board.spec.outputs
    volts_per_code = board.spec.full_scale_volts / (1 << board.spec.dac_bits)
    frames = []
    for seq, volts in enumerate(range(2, 22, 2)):
        frames.append((m.WriteOutputs(0, (round(volts / volts_per_code),) * outputs), seq))
    for i in range(repeats):
        volts = 22.0 if (i // outputs) % 2 == 0 else 20.0
        frames.append((m.WriteOutputs(i % outputs, (round(volts / volts_per_code),)), i))
    encoded = [encode_frame(Frame(board.spec.address, seq % 256, msg.CODE, msg.pack())) for msg, seq in frames]
    samples = []
    for k, frame in enumerate(encoded):
        now = clock.advance(2e-3)
        start = time.process_time_ns()
        replies = board.receive(frame, now)
        samples.append((time.process_time_ns() - start) * 1e-9)
        if len(replies) != 1:
            raise RuntimeError(f"write {k} got {len(replies)} replies")
    return statistics.median(samples[10:])


def _read_monitors_frame() -> bytes:
    from meshwarden.protocol import Frame, encode_frame
    from meshwarden.protocol import messages as m

    _read_monitors_frame.seq = (getattr(_read_monitors_frame, "seq", 0) + 1) % 256
    return encode_frame(
        Frame(
            1,
            _read_monitors_frame.seq,
            m.Command.READ_MONITORS,
            m.ReadMonitors(0, 32, 1000).pack(),
        )
    )


def median_wall_seconds(work: Callable[[], object], repeats: int) -> float:
    samples = []
    for _ in range(repeats):
        start = time.perf_counter()
        work()
        samples.append(time.perf_counter() - start)
    return statistics.median(samples)


def bench_bus(repeats: int) -> dict[str, float]:
    """Round trips through the daemon (demo configuration, in-process simulated rack, separate
    process), each also as a ratio to a raw pyzmq DEALER/ROUTER echo on loopback."""
    import json
    import subprocess
    import sys
    import threading

    import zmq

    from meshwarden.client import Client

    ctx = zmq.Context.instance()
    echo_port = free_port()
    router = ctx.socket(zmq.ROUTER)
    router.bind(f"tcp://127.0.0.1:{echo_port}")
    stop = threading.Event()

    def echo() -> None:
        while not stop.is_set():
            if router.poll(50):
                router.send_multipart(router.recv_multipart())

    thread = threading.Thread(target=echo, daemon=True)
    thread.start()
    dealer = ctx.socket(zmq.DEALER)
    dealer.connect(f"tcp://127.0.0.1:{echo_port}")
    payload = json.dumps({"v": 1, "id": "1", "client": "bench", "op": "status", "args": {}}).encode()

    def raw_round_trip() -> object:
        dealer.send(payload)
        return dealer.recv()

    for _ in range(50):
        raw_round_trip()
    baseline = median_wall_seconds(raw_round_trip, repeats)
    stop.set()
    thread.join()
    dealer.close(0)
    router.close(0)

    for stale in (REPO / "var").glob("demo-journal.sqlite*"):
        stale.unlink()  # the simulated rack is new on every run; so is the demo's journal
    endpoint = f"tcp://127.0.0.1:{free_port()}"
    pub = f"tcp://127.0.0.1:{free_port()}"
    daemon = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "meshwarden.cli",
            "--log-format",
            "json",
            "serve",
            "--config",
            str(REPO / "config" / "demo.yaml"),
            "--bind",
            endpoint,
            "--pub",
            pub,
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        client = Client(endpoint, pub, timeout_s=10.0, retries=0)
        client.wait_ready(30.0)
        client.arm()
        couplers = [f"c{g:02d}" for g in range(60)]
        counter = iter(range(10**9))

        def one_set() -> object:
            i = next(counter)
            return client.set({couplers[i % 60]: 1.0 + 0.5 * ((i // 60) % 2)}, volts=True)

        every = [f"c{g:02d}" for g in range(60)] + [f"p{g:02d}" for g in range(60)]

        def chip_set() -> object:
            i = next(counter)
            return client.set({a: 1.0 + 0.5 * (i % 2) for a in every}, volts=True)

        def monitors() -> object:
            return client.monitors()

        def cycle() -> object:  # what an experiment script's loop costs: set one, read all
            one_set()
            return client.monitors()

        rss_start = _rss_kib(daemon.pid)
        single = median_wall_seconds(one_set, repeats)
        whole = median_wall_seconds(chip_set, max(20, repeats // 10))
        reads = median_wall_seconds(monitors, repeats)
        cycles = median_wall_seconds(cycle, repeats)
        client.disarm()
        client.close()
        rss_end = _rss_kib(daemon.pid)
        bare = subprocess.run(
            [
                sys.executable,
                "-c",
                "import zmq, numpy, scipy.interpolate, serial, yaml, structlog;print(open('/proc/self/status').read())",
            ],
            capture_output=True,
            text=True,
        ).stdout
        rss_bare = next(int(line.split()[1]) for line in bare.splitlines() if line.startswith("VmRSS:"))
    finally:
        daemon.terminate()
        daemon.wait(timeout=20)
    telemetry = bench_telemetry()
    rack768 = bench_rack768(baseline)
    floor = bench_floor(repeats)
    irreducible = baseline + floor["journal_commit_fsync_us"] * 1e-6 + floor["board_transaction_us"] * 1e-6
    return {
        **rack768,
        **floor,
        "baseline_raw_zmq_echo_us": baseline * 1e6,
        "set_one_actuator_us": single * 1e6,
        "set_one_actuator_ratio": single / baseline,
        "set_one_actuator_ratio_to_its_floor": single / irreducible,
        "set_whole_chip_120_actuators_us": whole * 1e6,
        "set_whole_chip_ratio": whole / baseline,
        "monitors_read_48_us": reads * 1e6,
        "monitors_read_ratio": reads / baseline,
        "set_monitors_cycle_us": cycles * 1e6,
        "set_monitors_cycle_ratio": cycles / baseline,
        "daemon_rss_after_start_mib": rss_start / 1024,
        "daemon_rss_after_requests_mib": rss_end / 1024,
        "daemon_rss_ratio_to_bare_python_with_its_imports": rss_end / rss_bare,
        "daemon_rss_growth_during_requests_ratio": rss_end / rss_start,
        **telemetry,
    }


def bench_floor(repeats: int) -> dict[str, float]:
    """What a `set` cannot do without, measured on this machine: one durable journal commit (an
    SQLite WAL commit with synchronous=FULL, fsynced, in the journal's folder) and one board
    transaction (a one-channel write with its readback, on the board's own thread, in process).
    A set waits for the first before it does the second; the raw echo is the third part."""
    import asyncio
    import dataclasses
    import sqlite3
    import tempfile

    from meshwarden.api import open_controller
    from meshwarden.config import load_config

    folder = REPO / "var"
    folder.mkdir(exist_ok=True)
    with tempfile.TemporaryDirectory(dir=folder) as tmp:
        db = sqlite3.connect(Path(tmp) / "floor.sqlite", isolation_level=None)
        db.execute("PRAGMA journal_mode=WAL")
        db.execute("PRAGMA synchronous=FULL")
        db.execute("CREATE TABLE t (a, b, c, d, e, f, g, h, i, j)")
        row = iter(range(10**9))

        def commit() -> object:
            db.execute("BEGIN IMMEDIATE")
            db.execute("INSERT INTO t VALUES (?,?,?,?,?,?,?,?,?,?)", (next(row),) * 10)
            return db.execute("COMMIT")

        fsync = median_wall_seconds(commit, repeats)
        db.close()

        config = load_config(REPO / "config" / "demo.yaml")
        config = dataclasses.replace(config, journal=dataclasses.replace(config.journal, path=Path(tmp) / "j.sqlite"))

        async def transactions() -> float:
            async with open_controller(config) as ctl:
                await ctl.arm()
                await ctl.set({"c00": 1.0}, volts=True)
                code = ctl.describe("c00")["code"]
                channel = ctl.actuators["c00"].config.output.index

                def on_board(driver: Any) -> float:
                    step = iter(range(10**9))
                    return median_wall_seconds(lambda: driver.write_codes(channel, (code + next(step) % 2,)), repeats)

                board = await ctl._state.rack.call(ctl.actuators["c00"].board.id, on_board)
                await ctl.disarm()
                return board

        board = asyncio.run(transactions())
    return {"journal_commit_fsync_us": fsync * 1e6, "board_transaction_us": board * 1e6}


def write_rack768(folder: Path) -> Path:
    """A generated 768-channel bench (bench only, beside the demo): 12 boards x 64 outputs, a chip
    of 384 gates (a coupler and a phase shifter each), design-nominal tables, no optics."""
    from meshsim.nominal import write_nominal_tables
    from meshsim.params import parse_params
    from meshsim.scenario import load_scenario

    folder.mkdir(parents=True, exist_ok=True)
    lines = ["rack:", "  boards:"]
    for b in range(12):
        lines.append(
            f"    - {{id: b{b:02d}, url: 'meshsim://rack768/b{b:02d}?config={{config_dir}}/rack768.yaml', "
            f"address: 1, outputs: 64, monitor_inputs: 32, timeout_s: 0.5, retries: 3}}"
        )
    lines += [
        "chip:",
        "  actuator_defaults:",
        "    coupler: {limit_volts: 42, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 2 ms}",
        "    phase: {limit_volts: 44, pull_in_volts: 55, step_limit_volts: 4, dwell_s: 2 ms}",
        "  actuators:",
    ]
    gates = []
    for b in range(12):
        for g in range(32):
            n = b * 32 + g
            lines.append(f"    - {{id: c{n:03d}, kind: coupler, output: 'b{b:02d}:{2 * g}'}}")
            lines.append(f"    - {{id: p{n:03d}, kind: phase, output: 'b{b:02d}:{2 * g + 1}'}}")
            gates.append(f"    - {{id: g{n:03d}, coupler: c{n:03d}, phase: p{n:03d}}}")
    lines += ["  gates:", *gates]
    lines += ["calibration: {directory: cal}", "journal: {path: journal.sqlite}"]
    lines += ["simulator: {seed: 7, laser: {wavelength_nm: 1550, power_mw: 1.0, input_modes: [0]}}"]
    path = folder / "rack768.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    scenario = load_scenario(path)
    write_nominal_tables(scenario, parse_params(scenario.simulator), folder / "cal")
    return path


def _start_daemon(config: Path) -> tuple[Any, str, str]:
    import subprocess
    import sys

    endpoint = f"tcp://127.0.0.1:{free_port()}"
    pub = f"tcp://127.0.0.1:{free_port()}"
    args = [sys.executable, "-m", "meshwarden.cli", "--log-format", "json", "serve", "--config", str(config)]
    daemon = subprocess.Popen(
        [*args, "--bind", endpoint, "--pub", pub], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    return daemon, endpoint, pub


FLOOD_SCRIPT = """
import signal, sys
from meshwarden.client import Client
count = 0
def done(*_):
    print(count, flush=True)
    sys.exit(0)
signal.signal(signal.SIGTERM, done)
with Client(sys.argv[1], sys.argv[2], timeout_s=30.0, retries=0) as other:
    while True:
        other.status()
        count += 1
"""


def bench_rack768(baseline_s: float, repeats: int = 20, estops: int = 30) -> dict[str, float]:
    """The 768-channel rack in one daemon: a whole-rack set, and the emergency stop's latency
    (request to reply, which comes once every board has confirmed its zero) while a 768-channel
    ramp runs and another client floods the daemon with requests."""
    import subprocess
    import sys
    import tempfile

    from meshwarden.client import Client

    with tempfile.TemporaryDirectory(prefix="meshwarden-rack768-") as tmp:
        config = write_rack768(Path(tmp))
        daemon, endpoint, pub = _start_daemon(config)
        try:
            client = Client(endpoint, pub, timeout_s=30.0, retries=0)
            client.wait_ready(60.0)
            client.arm()
            every = [f"{k}{n:03d}" for n in range(384) for k in ("c", "p")]
            counter = iter(range(10**9))

            def rack_set() -> object:
                i = next(counter)
                return client.set({a: 1.0 + 0.5 * (i % 2) for a in every}, volts=True)

            rack_set()
            whole = median_wall_seconds(rack_set, repeats)
            # The flood comes from another process, as another client's would (a thread here
            # would measure this process's own contention for the interpreter, not the daemon).
            flooder = subprocess.Popen(
                [sys.executable, "-c", FLOOD_SCRIPT, endpoint, pub], stdout=subprocess.PIPE, text=True
            )
            latencies = []
            for k in range(estops):
                client.arm()
                client.set({a: 20.0 + (k % 3) for a in every}, volts=True, wait=False)  # ~10 steps of ramp
                time.sleep(0.02 + 0.01 * (k % 5))
                started = time.perf_counter()
                client.estop(reason="bench")
                latencies.append(time.perf_counter() - started)
            flooder.terminate()
            flooded = [int((flooder.communicate(timeout=30)[0] or "0").split()[-1] or 0)]
            client.close()
        finally:
            daemon.terminate()
            daemon.wait(timeout=30)
    latencies.sort()
    p99 = latencies[min(len(latencies) - 1, round(0.99 * (len(latencies) - 1)))]
    return {
        "set_whole_rack_768_us": whole * 1e6,
        "set_whole_rack_768_ratio": whole / baseline_s,
        "estop_latency_p50_ms": statistics.median(latencies) * 1e3,
        "estop_latency_p99_ms": p99 * 1e3,
        "estop_trials": float(len(latencies)),
        "flood_requests_during_estops": float(flooded[0]),
    }


def bench_interlock(repeats: int) -> dict[str, float]:
    """Emergency stop latency from an interlock opening to every board at zero, read from the
    simulated boards' own write logs (their clock runs at wall speed), for the demo rack with the
    reference driver and with the scpi driver; as a ratio to an estop requested directly."""
    import asyncio
    import dataclasses
    import tempfile

    from meshsim import inprocess
    from meshwarden.api import open_controller
    from meshwarden.config import load_config
    from meshwarden.config.model import JournalConfig, RackConfig

    def zero_at(rack: object, board: str, since: float) -> float | None:
        """When the board first held every output at zero at or after ``since`` (None: not yet),
        replaying its write log (a SCPI board zeroes channel by channel, a reference one at once)."""
        sim = rack.board(board)  # type: ignore[attr-defined]
        codes = [0] * sim.spec.outputs
        for t, kind, first, values in list(sim.write_log):
            if kind in ("boot", "zero", "ramped_to_zero"):
                codes = [0] * len(codes)
            elif kind == "output_off":
                codes[first] = 0
            elif kind == "write":
                codes[first : first + len(values)] = values
            if t >= since and not any(codes):
                return float(t)
        return None

    async def all_zero(rack: object, since: float) -> float:
        deadline = time.monotonic() + 30.0
        while True:
            times = [zero_at(rack, b, since) for b in rack.boards]  # type: ignore[attr-defined]
            if all(t is not None for t in times):
                return max(t for t in times if t is not None) - since
            if time.monotonic() > deadline:
                raise RuntimeError("the boards did not all reach zero")
            await asyncio.sleep(0.002)

    async def run(config_name: str, rack_name: str, folder: Path) -> tuple[list[float], list[float]]:
        config = load_config(REPO / "config" / config_name)
        boards = tuple(dataclasses.replace(b, interlock=b.id == "b0") for b in config.rack.boards)
        config = dataclasses.replace(
            config, rack=RackConfig(boards), journal=JournalConfig(folder / f"{rack_name}.sqlite")
        )
        by_interlock, direct = [], []
        async with open_controller(config) as ctl:
            rack = inprocess.get(rack_name)
            targets = {f"c{g:02d}": 5.0 for g in range(0, 60, 6)}
            for _ in range(repeats):
                await ctl.arm()
                await ctl.set(targets, volts=True)
                opened = rack.clock.now()
                rack.set_interlock("b0", True)
                by_interlock.append(await all_zero(rack, opened))
                rack.set_interlock("b0", False)
                await ctl.interlocks_once()
                await ctl.arm()
                await ctl.set(targets, volts=True)
                asked = rack.clock.now()
                await ctl.estop(reason="bench")
                direct.append(await all_zero(rack, asked))
        inprocess.remove(rack_name)
        return by_interlock, direct

    out: dict[str, float] = {}
    with tempfile.TemporaryDirectory() as tmp:
        for driver, config_name, rack_name in (
            ("reference", "demo.yaml", "demo"),
            ("scpi", "demo-scpi.yaml", "demo-scpi"),
        ):
            by_interlock, direct = asyncio.run(run(config_name, rack_name, Path(tmp)))
            out[f"{driver}_interlock_to_all_zero_ms_median"] = statistics.median(by_interlock) * 1e3
            out[f"{driver}_interlock_to_all_zero_ms_max"] = max(by_interlock) * 1e3
            out[f"{driver}_direct_estop_to_all_zero_ms_median"] = statistics.median(direct) * 1e3
            out[f"{driver}_interlock_ratio_to_direct_estop"] = statistics.median(by_interlock) / statistics.median(
                direct
            )
    out["interlock_poll_interval_ms"] = 50.0
    return out


def _rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text(encoding="ascii").splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return 0


def bench_telemetry(count: int = 20000) -> dict[str, float]:
    """Messages per second through the daemon's Telemetry publisher to a subscriber, as a ratio to
    raw pyzmq PUB/SUB with the same message size."""
    import asyncio
    import json

    import zmq
    import zmq.asyncio

    from meshwarden.service.telemetry import Telemetry

    body = {"monitors": {f"m{i:02d}": {"amps": 1.234e-6, "watts": 1.371e-6, "counts": 12345.0} for i in range(48)}}

    async def run(use_telemetry: bool) -> float:
        ctx = zmq.asyncio.Context()
        port = free_port()
        pub = ctx.socket(zmq.PUB)
        pub.setsockopt(zmq.SNDHWM, 0)
        pub.bind(f"tcp://127.0.0.1:{port}")
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.RCVHWM, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        sub.connect(f"tcp://127.0.0.1:{port}")
        await asyncio.sleep(0.3)
        telemetry = Telemetry(pub)
        raw = json.dumps({"seq": 1, "ts": 0.0, "topic": "monitors", **body}).encode()

        async def produce() -> None:
            for _ in range(count):
                if use_telemetry:
                    await telemetry.publish("monitors", body)
                else:
                    await pub.send_multipart([b"monitors", raw])

        start = time.perf_counter()
        producer = asyncio.create_task(produce())
        for _ in range(count):
            await sub.recv_multipart()
        await producer
        elapsed = time.perf_counter() - start
        pub.close(0)
        sub.close(0)
        ctx.term()
        return count / elapsed

    raw_rate = asyncio.run(run(False))
    ours = asyncio.run(run(True))
    return {
        "telemetry_raw_pubsub_msgs_per_s": raw_rate,
        "telemetry_msgs_per_s": ours,
        "telemetry_throughput_ratio": ours / raw_rate,
    }


def _repo_on_path() -> None:
    """The hardening figures reuse the test bench and the message generator under tests/."""
    import sys

    if str(REPO) not in sys.path:
        sys.path.insert(0, str(REPO))


def _bench_daemon(folder: Path, service: str) -> tuple[Any, str]:
    """The one-board test bench as a daemon process with extra ``service`` settings."""
    _repo_on_path()
    from tests.control.bench import write_bench
    from tests.service.daemon import start_daemon

    config, _ = write_bench(folder)
    config.write_text(config.read_text().replace("journal:", f"service:\n{service}journal:"))
    daemon = start_daemon(config, folder)
    return daemon, daemon.endpoint


def bench_hostile_messages(count: int = 100_000) -> dict[str, object]:
    """``count`` seeded hostile messages (tests/service/fuzzgen.py) against the bench daemon:
    every reply checked; the daemon's RSS before and after; the wall time as a ratio to the same
    number of plain ``status`` round trips."""
    import tempfile

    _repo_on_path()
    from tests.service import fuzzgen

    with tempfile.TemporaryDirectory() as tmp:
        daemon, endpoint = _bench_daemon(Path(tmp), "  max_message_bytes: 8192\n")
        pid = daemon.proc.pid
        try:
            fuzzgen.run(endpoint, 2000, seed=1, cap_bytes=8192)  # warm up: imports, journal pages
            rss_before = _rss_kib(pid)
            started = time.monotonic()
            codes = fuzzgen.run(endpoint, count, seed=2, cap_bytes=8192)
            hostile_s = time.monotonic() - started
            rss_after = _rss_kib(pid)
            plain = fuzzgen.Message([b'{"v":1,"id":"s","client":"b","op":"status"}'], "s")
            started = time.monotonic()
            _round_trips(endpoint, plain, 5000)
            status_s = (time.monotonic() - started) * count / 5000
            with daemon.client() as mw:
                state = mw.get()
        finally:
            daemon.stop()
    assert not state["armed"] and all(a["code"] == 0 for a in state["actuators"].values())
    return {
        "hostile_messages": count,
        "hostile_reply_codes": codes,
        "hostile_internal_errors": codes.get("error", 0),
        "hostile_seconds": hostile_s,
        "hostile_ratio_to_status_round_trips": hostile_s / status_s,
        "hostile_daemon_rss_before_mib": rss_before / 1024,
        "hostile_daemon_rss_after_mib": rss_after / 1024,
        "hostile_daemon_rss_growth_mib": (rss_after - rss_before) / 1024,
    }


def _round_trips(endpoint: str, message: Any, count: int) -> None:
    import zmq

    sock = zmq.Context.instance().socket(zmq.DEALER)
    sock.connect(endpoint)
    for _ in range(count):
        sock.send_multipart(message.frames)
        sock.recv()
    sock.close(0)


def bench_reply_flood(clients: int = 48, per_client: int = 64) -> dict[str, object]:
    """Many client ids each asking for the largest reply there is (``events`` with limit 1000 on
    a journal of thousands of events), never resending: the reply cache must stay within
    ``service.reply_cache_bytes`` (default 32 MiB), so the daemon's RSS growth stays near it."""
    import json
    import tempfile

    import zmq

    with tempfile.TemporaryDirectory() as tmp:
        daemon, endpoint = _bench_daemon(Path(tmp), "  max_message_bytes: 1048576\n")
        pid = daemon.proc.pid
        sock = zmq.Context.instance().socket(zmq.DEALER)
        sock.setsockopt(zmq.LINGER, 0)
        sock.connect(endpoint)
        try:
            name = "x" * 100
            for i in range(2000):  # 2000 refusals, each journaled with its reason: big events
                sock.send(
                    json.dumps(
                        {"v": 1, "id": f"f{i}", "client": "fill", "op": "set", "args": {"values": {name: 1}}}
                    ).encode()
                )
                sock.recv()
            probe = b'{"v":1,"id":"p","client":"probe","op":"events","args":{"limit":1000}}'
            sock.send(probe)
            reply_bytes = len(sock.recv())
            rss_before = _rss_kib(pid)
            peak = rss_before
            for n in range(per_client):
                for c in range(clients):
                    sock.send(
                        json.dumps(
                            {"v": 1, "id": f"q{n}", "client": f"flood-{c}", "op": "events", "args": {"limit": 1000}}
                        ).encode()
                    )
                for _ in range(clients):
                    sock.recv()
                peak = max(peak, _rss_kib(pid))
            rss_after = _rss_kib(pid)
        finally:
            sock.close(0)
            daemon.stop()
    return {
        "flood_requests": clients * per_client,
        "flood_client_ids": clients,
        "flood_reply_kib": reply_bytes / 1024,
        "flood_replies_total_mib": clients * per_client * reply_bytes / 2**20,
        "flood_reply_cache_bound_mib": 32.0,
        "flood_daemon_rss_before_mib": rss_before / 1024,
        "flood_daemon_rss_peak_mib": peak / 1024,
        "flood_daemon_rss_after_mib": rss_after / 1024,
        "flood_daemon_rss_growth_mib": (rss_after - rss_before) / 1024,
    }


def bench_jobs(counts: tuple[int, int] = (1_000, 10_000)) -> dict[str, float]:
    """Memory held by the job table after many short jobs (traced Python allocations): after
    10,000 it must be what it was after 1,000 - finished jobs leave nothing behind."""
    import asyncio
    import gc
    import tracemalloc

    from meshwarden.service.jobs import Jobs

    async def run(count: int) -> int:
        async def publish(topic: str, body: dict[str, object]) -> int:
            return 0

        async def work() -> int:
            return 1

        tracemalloc.start()
        jobs = Jobs(publish)
        for _ in range(count):
            jobs.start("bench", "bench", work())
            await asyncio.sleep(0)
        for _ in range(5):
            await asyncio.sleep(0)
        gc.collect()
        held, _ = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        del jobs
        return held

    small, large = (asyncio.run(run(c)) for c in counts)
    return {
        f"jobs_traced_kib_after_{counts[0]}": small / 1024,
        f"jobs_traced_kib_after_{counts[1]}": large / 1024,
        "jobs_memory_ratio_10x_jobs": large / small,
    }


def bench_locks(seconds: float, time_scale: float = 1.0) -> dict[str, object]:
    """Locks on the drifting eight-MZI bench (tests/procedures/lockbench.py): the loop rate achieved with
    one lock and with eight (sample period, window, corrections per second), and the residuals of eight
    locks held for ``seconds`` of simulated time with a 0.5 rad temperature step midway (figures as in
    tests/procedures/lockrun.py). At ``time_scale`` 1 the loop runs at its real rate; a larger scale
    makes drift X times faster against the loop (a harder test, not a faster one of the same)."""
    import tempfile

    _repo_on_path()
    from tests.procedures.lockrun import run_locks

    holds = ["max", "min", "fraction=0.3", "max", "min", "fraction=0.7", "max", "max"]
    out: dict[str, object] = {}
    with tempfile.TemporaryDirectory() as folder:
        start = time.monotonic()
        one = run_locks(Path(folder) / "one", ["max"], 4.0)
        out["one_lock"] = {k: v for k, v in one.as_dict().items() if k != "locks"}
        eight = run_locks(
            Path(folder) / "eight", holds, seconds, kick_at_s=seconds / 2, time_scale=time_scale, recover_s=1.0
        )
        out["eight_locks"] = eight.as_dict()
        out["simulated_s"] = seconds
        out["time_scale"] = time_scale
        out["wall_s"] = time.monotonic() - start
    return out


def bench_lock_scaling(counts: tuple[int, ...] = (1, 8, 30, 60), seconds: float = 3.0) -> dict[str, object]:
    """The loop rate with every phase shifter of the demo chip locked (two boards, 48 monitors): the
    sample period (one guarded move per lock, all at once, and one read of every monitor) and the
    window for 1 to 60 locks, each on monitor m{i mod 48} (so pairs share one and get distinct cycles).
    Only the rate is measured here: with one lit input most taps see little light."""
    import asyncio
    import dataclasses
    import tempfile

    import meshsim.urlhandler.protocol_meshsim  # noqa: F401
    from meshsim import inprocess
    from meshwarden.api import open_controller
    from meshwarden.config import load_config
    from meshwarden.procedures.lock_law import parse_hold
    from meshwarden.procedures.locks import LockEngine, LockSpec

    out: dict[str, object] = {}
    for count in counts:
        with tempfile.TemporaryDirectory() as folder:
            config = load_config(REPO / "config" / "demo.yaml")
            journal = dataclasses.replace(config.journal, path=Path(folder) / "journal.sqlite")
            config = dataclasses.replace(config, journal=journal)

            async def run(config: Any = config, count: int = count) -> dict[str, float]:
                async with open_controller(config) as ctl:
                    await ctl.arm()
                    engine = LockEngine(ctl)
                    for i in range(count):
                        spec = LockSpec(f"L{i}", f"p{i:02d}", f"m{i % 48:02d}", parse_hold("max"))
                        await engine.start(spec)
                    windows = engine.windows
                    await asyncio.sleep(seconds)
                    figures = {
                        "sample_period_ms": engine.sample_period_s * 1e3,
                        "window_samples": round(next(iter(engine.locks.values())).window_s / engine.sample_period_s),
                        "window_ms": next(iter(engine.locks.values())).window_s * 1e3,
                        "windows_in_run": engine.windows - windows,
                    }
                    await engine.close()
                    await ctl.disarm()
                    return figures

            try:
                out[f"{count}_locks"] = asyncio.run(run())
            finally:
                inprocess.remove("demo")
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--out", type=Path, required=True)
    parser.add_argument("--repeats", type=int, default=500)
    parser.add_argument(
        "--only",
        choices=("all", "simulator", "bus", "interlock", "hardening", "lock"),
        default="all",
        help="one section of the figures (default: all)",
    )
    parser.add_argument(
        "--lock-seconds", type=float, default=20.0, help="simulated seconds the eight locks hold (600: ten minutes)"
    )
    parser.add_argument("--lock-time-scale", type=float, default=1.0, help="simulated time per wall second")
    parser.add_argument("--hostile", type=int, default=100_000, help="hostile messages to send (default 100,000)")
    args = parser.parse_args()
    results: dict[str, object] = {
        "machine": {
            "python": platform.python_version(),
            "processor": platform.processor() or platform.machine(),
            "cpus": __import__("os").cpu_count(),
        },
        "repeats": args.repeats,
    }
    if args.only in ("all", "simulator"):
        results["simulator"] = bench_simulator(args.repeats)
    if args.only in ("all", "bus"):
        results["bus"] = bench_bus(min(args.repeats, 300))
    if args.only in ("all", "interlock"):
        results["interlock"] = bench_interlock(min(args.repeats, 10))
    if args.only in ("all", "lock"):
        results["locks"] = bench_locks(args.lock_seconds, args.lock_time_scale)
        results["lock_scaling_demo_chip"] = bench_lock_scaling()
    if args.only in ("all", "hardening"):
        results["hardening"] = {**bench_hostile_messages(args.hostile), **bench_reply_flood(), **bench_jobs()}
    text = json.dumps(results, indent=2)
    args.out.write_text(text + "\n", encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
