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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--out", type=Path, required=True)
    parser.add_argument("--repeats", type=int, default=500)
    args = parser.parse_args()
    results: dict[str, object] = {
        "machine": {
            "python": platform.python_version(),
            "processor": platform.processor() or platform.machine(),
            "cpus": __import__("os").cpu_count(),
        },
        "repeats": args.repeats,
    }
    results["simulator"] = bench_simulator(args.repeats)
    text = json.dumps(results, indent=2)
    args.out.write_text(text + "\n", encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
