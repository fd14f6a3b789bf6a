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

import numpy as np

from meshwarden.testing import free_port

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

    rack = SimRack.from_config(REPO / "config" / "demo.yaml", clock=ManualClock())
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
    return {
        "baseline_numpy_8_matvec_us": base * 1e6,
        "sim_monitor_read_32_inputs_us": read * 1e6,
        "sim_monitor_read_ratio": read / base,
        "sim_chip_tap_powers_us": taps * 1e6,
        "sim_chip_tap_powers_ratio": taps / base,
    }


def _read_monitors_frame() -> bytes:
    from meshwarden.protocol import Frame, encode_frame
    from meshwarden.protocol import messages as m

    _read_monitors_frame.seq = (getattr(_read_monitors_frame, "seq", 0) + 1) % 256  # type: ignore[attr-defined]
    return encode_frame(
        Frame(
            1,
            _read_monitors_frame.seq,
            m.Command.READ_MONITORS,  # type: ignore[attr-defined]
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

        rss_start = _rss_kib(daemon.pid)
        single = median_wall_seconds(one_set, repeats)
        whole = median_wall_seconds(chip_set, max(20, repeats // 10))
        reads = median_wall_seconds(monitors, repeats)
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
    return {
        "baseline_raw_zmq_echo_us": baseline * 1e6,
        "set_one_actuator_us": single * 1e6,
        "set_one_actuator_ratio": single / baseline,
        "set_whole_chip_120_actuators_us": whole * 1e6,
        "set_whole_chip_ratio": whole / baseline,
        "monitors_read_48_us": reads * 1e6,
        "monitors_read_ratio": reads / baseline,
        "daemon_rss_after_start_mib": rss_start / 1024,
        "daemon_rss_after_requests_mib": rss_end / 1024,
        "daemon_rss_ratio_to_bare_python_with_its_imports": rss_end / rss_bare,
        "daemon_rss_growth_during_requests_ratio": rss_end / rss_start,
        **telemetry,
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--out", type=Path, required=True)
    parser.add_argument("--repeats", type=int, default=500)
    parser.add_argument("--only", choices=("simulator", "bus", "interlock"), default=None)
    args = parser.parse_args()
    results: dict[str, object] = {
        "machine": {
            "python": platform.python_version(),
            "processor": platform.processor() or platform.machine(),
            "cpus": __import__("os").cpu_count(),
        },
        "repeats": args.repeats,
    }
    if args.only in (None, "simulator"):
        results["simulator"] = bench_simulator(args.repeats)
    if args.only in (None, "bus"):
        results["bus"] = bench_bus(min(args.repeats, 300))
    if args.only in (None, "interlock"):
        results["interlock"] = bench_interlock(min(args.repeats, 10))
    text = json.dumps(results, indent=2)
    args.out.write_text(text + "\n", encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
