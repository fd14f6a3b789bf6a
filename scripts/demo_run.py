"""The demo: check the demo configuration, then talk to the simulated rack over real ptys."""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "config" / "demo.yaml"


def main() -> int:
    print("== meshwarden check-config config/demo.yaml")
    check = subprocess.run([sys.executable, "-m", "meshwarden.cli", "check-config", str(CONFIG)])
    if check.returncode != 0:
        return check.returncode
    import serial

    from meshwarden.protocol import Frame, FrameDecoder, decode_reply, encode_frame
    from meshwarden.protocol import messages as m

    with tempfile.TemporaryDirectory() as tmp:
        ports_file = Path(tmp) / "ports.json"
        print("\n== meshsim serve --transport pty (the simulated rack, in its own process)")
        sim = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "meshsim.cli",
                "serve",
                "--config",
                str(CONFIG),
                "--transport",
                "pty",
                "--ports-file",
                str(ports_file),
            ]
        )
        try:
            while not ports_file.exists():
                if sim.poll() is not None:
                    return 2
                time.sleep(0.05)
            ports = json.loads(ports_file.read_text())
            for board, url in ports.items():
                port = serial.serial_for_url(url, timeout=1.0, exclusive=True)
                decoder = FrameDecoder()

                def ask(
                    seq: int, message: m.Message, port: serial.SerialBase = port, decoder: FrameDecoder = decoder
                ) -> m.Message:
                    port.write(encode_frame(Frame(1, seq, message.CODE, message.pack())))
                    while True:
                        for item in decoder.feed(port.read(1)):
                            if isinstance(item, Frame):
                                return decode_reply(item.command, item.payload)

                ident = ask(1, m.Identify())
                assert isinstance(ident, m.IdentifyReply)
                print(
                    f"{board} at {url}: {ident.model} firmware {'.'.join(map(str, ident.firmware))}, "
                    f"{ident.outputs} outputs, {ident.monitor_inputs} monitor inputs, {ident.dac_bits}-bit DAC, "
                    f"{ident.full_scale_mv / 1000:g} V, boot {ident.boot_count}"
                )
                ask(2, m.SetMonitorGain(0, (2,) * ident.monitor_inputs))
                reading = ask(3, m.ReadMonitors(0, ident.monitor_inputs, 2000))
                assert isinstance(reading, m.MonitorsReply)
                lit = [f"in{i}={c}" for i, c in enumerate(reading.counts) if c > 100]
                print(f"   monitors with light (ADC counts, all actuators at 0 V): {', '.join(lit) or 'none'}")
                port.close()
        finally:
            sim.terminate()
            sim.wait(timeout=10)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
