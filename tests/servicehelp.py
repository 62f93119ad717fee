"""Start the real service (`maskrun serve`) in a subprocess on loopback for the service tests."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

from benchcfg import small_bench_text

MASKRUN = str(Path(sys.executable).parent / "maskrun")  # the installed console script

LOOPBACK_SERVICE = """
[service]
control_address = "tcp://127.0.0.1:0"
publish_address = "tcp://127.0.0.1:0"
status_interval_s = 0.2
"""


def service_config_text(*, service_table: str = LOOPBACK_SERVICE, recon: bool = True, preview_hwm: int | None = None,
                        **bench_kw) -> str:
    text = small_bench_text(**bench_kw)
    if not recon:
        text = text.replace("[reconstruction]\n", "[reconstruction]\nenabled = false\n", 1)
    if preview_hwm is not None:
        text += f"\n[stream]\npreview_hwm = {preview_hwm}\n"
    return text + "\n" + service_table


class Daemon:
    """A `maskrun serve` subprocess; ``control``/``stream`` addresses once ready."""

    def __init__(self, folder: Path, config_text: str, *, extra_args: tuple[str, ...] = ()):
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.config = folder / "bench.toml"
        self.config.write_text(config_text)
        self.ready_file = folder / "ready.json"
        self.log = open(folder / "serve.log", "w+")
        env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
        self.proc = subprocess.Popen(
            [MASKRUN, "serve", str(self.config), "--ready-file", str(self.ready_file),
             *extra_args],
            cwd=folder, stdout=self.log, stderr=subprocess.STDOUT, env=env)
        self.control = self.stream = ""
        self.keys = None  # client keys folder, for a daemon that uses CURVE

    def wait_ready(self, timeout_s: float = 30.0) -> "Daemon":
        deadline = time.monotonic() + timeout_s
        while not self.ready_file.exists():
            if self.proc.poll() is not None:
                raise RuntimeError(f"daemon exited with {self.proc.returncode}: {self.output()}")
            if time.monotonic() > deadline:
                raise TimeoutError(f"daemon not ready after {timeout_s} s: {self.output()}")
            time.sleep(0.05)
        info = json.loads(self.ready_file.read_text())
        self.control, self.stream = info["control_address"], info["publish_address"]
        return self

    def output(self) -> str:
        self.log.flush()
        return (self.folder / "serve.log").read_text()

    def stop(self) -> int:
        """Shut the daemon down through its control socket (kill if it does not answer)."""
        from maskrun.daemon.service.client import ServiceClient, ServiceUnreachable

        if self.proc.poll() is None and self.control:
            try:
                address = self.control.replace("0.0.0.0", "127.0.0.1")
                with ServiceClient(address, keys=self.keys, timeout_s=3) as c:
                    c.shutdown()
            except ServiceUnreachable:
                pass
        try:
            return self.proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            return self.proc.wait(timeout=5)
        finally:
            self.log.close()
