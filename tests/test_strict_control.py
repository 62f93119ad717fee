"""Strict control messages and exposures within the camera's own limits.

- JSON ``null`` is refused wherever a value has a type (every optional field of every request),
  parsed in-process and sent to a real `maskrun serve` over a real ZeroMQ socket.
- Exposures are checked against the camera's limits as its driver reports them
  (``Camera.exposure_range_s``; the simulated camera: min_exposure_s = 1e-5 s by default) on
  'set_exposure', on 'start', and when the config is read.
- A run whose device refuses its own settings before the first frame says that no resume can fix
  it, and resume refuses it with the same words.
"""

from __future__ import annotations

import io
import json
import subprocess

import pytest
from pydantic import ValidationError
from rich.console import Console

from benchcfg import small_bench_text
from maskrun.daemon.service import control as C
from maskrun.daemon.service.client import RequestRefused, ServiceClient
from maskrun.daemon.config import ConfigError, parse_config
from servicehelp import MASKRUN, Daemon, service_config_text

# every request field that may be left out (a default exists), by request
OPTIONAL_FIELDS = {
    "start": ["passes", "exposure_s", "dark_frames", "interval_s", "name", "output_dir", "output_path"],
    "align_start": ["mask", "exposure_s", "iterations"],
    "take_darks": ["count"],
    "pause": ["reason"],
    "stop": ["reason"],
    "acknowledge": ["how"],
    "simulate": ["shift_px"],
}


@pytest.mark.parametrize("name,field", [(n, f) for n, fs in OPTIONAL_FIELDS.items() for f in fs])
def test_null_is_refused_for_every_optional_field(name, field):
    body = {"request": name, field: None}
    if name == "acknowledge":
        body["who"] = "A. Operator"
    if name == "simulate":
        body["action"] = "shift_sample"
    with pytest.raises(C.BadRequest, match=f"{field}: null is not allowed"):
        C.parse_request(json.dumps(body).encode())
    with pytest.raises(ValidationError):  # the strict model itself refuses it (wrong type), not only the parser
        C._ADAPTER.validate_json(json.dumps(body))
    del body[field]
    C.parse_request(json.dumps(body).encode())  # left out: accepted, the default applies


def test_required_fields_refuse_null_too():
    for raw in ({"request": "set_exposure", "exposure_s": None}, {"request": "acknowledge", "who": None}):
        with pytest.raises(C.BadRequest, match="null is not allowed"):
            C.parse_request(json.dumps(raw).encode())


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    d = Daemon(tmp_path_factory.mktemp("strict"), service_config_text(recon=False)).wait_ready()
    yield d
    d.stop()


def test_the_daemon_refuses_null_and_exposures_the_camera_cannot_take(daemon):
    with ServiceClient(daemon.control, timeout_s=10) as c:
        c.acknowledge("A. Operator")
        reply = c.send_raw(b'{"request": "start", "passes": null}')
        assert not reply.ok and "passes: null is not allowed" in reply.error
        reply = c.send_raw(b'{"request": "align_start", "mask": null}')
        assert not reply.ok and "mask: null is not allowed" in reply.error
        assert c.status()["state"] == "idle"  # nothing started
        with pytest.raises(RequestRefused, match=r"outside what the camera takes \(1e-05 to"):
            c.set_exposure(1e-9)
        with pytest.raises(RequestRefused, match=r"outside what the camera takes"):
            c.start(passes=1, exposure_s=1e-9)
        with pytest.raises(RequestRefused, match=r"outside what the camera takes"):
            c.align_start(exposure_s=1e-9)
        assert c.status()["state"] == "idle"
        assert not list(daemon.folder.rglob("*.h5"))  # nothing written
        assert c.set_exposure(2e-5)["exposure_s"] == 2e-5  # just above the camera's minimum: accepted
        c.set_exposure(0.002)


def test_a_config_exposure_below_the_cameras_minimum_is_refused_when_read(tmp_path):
    text = small_bench_text(exposure_s=0.002).replace("exposure_s = 0.002", "exposure_s = 1e-9", 1)
    cfg_path = tmp_path / "bench.toml"
    cfg_path.write_text(text)
    out = subprocess.run([MASKRUN, "run", str(cfg_path), "--acknowledge-safety", "--output-dir", str(tmp_path)],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 2, out.stdout + out.stderr
    assert "camera.exposure_s" in out.stderr and "outside what the camera takes" in out.stderr
    assert "acknowledged" not in out.stdout.lower()  # refused before the notice
    assert not list(tmp_path.rglob("*.h5"))
    from maskrun.daemon.acquire.bench import build_bench

    with pytest.raises(ConfigError, match="camera.exposure_s"):
        build_bench(parse_config(text, str(cfg_path)))


def test_a_run_the_camera_refuses_before_its_first_frame_does_not_advise_resuming(tmp_path, monkeypatch):
    """A driver that does not report its limits (the interface default) and refuses the exposure when
    the run sets it: the run faults with 0 frames and says no resume can fix it; resume agrees."""
    from maskrun.daemon.acquire.foreground import RunRequest, resume_foreground, run_foreground
    from maskrun.daemon.acquire.recovery import ResumeError
    from maskrun.daemon.record.runfile import RunFile
    from maskrun.drivers.base import Camera
    from maskrun.simulators.camera import SimulatedCamera

    monkeypatch.setattr(SimulatedCamera, "exposure_range_s", Camera.exposure_range_s)  # limits not reported
    cfg = parse_config(small_bench_text(passes=2), str(tmp_path / "b.toml"))
    out = io.StringIO()
    summary = run_foreground(cfg, RunRequest(acknowledge_unattended=True, output_dir=str(tmp_path), exposure_s=1e-9,
                                             figure=False), Console(file=out, width=200))
    text = out.getvalue()
    assert summary.state.value == "fault" and summary.frames == 0 and not summary.resumable
    assert "No resume can fix this" in text and "maskrun resume" not in text
    with RunFile(summary.output_path) as rf:
        end = rf.last_end()["message"]
    assert "no resume can fix this" in end and "maskrun resume" not in end
    with pytest.raises(ResumeError, match="no resume can fix this"):
        resume_foreground(summary.output_path, RunRequest(acknowledge_unattended=True), Console(file=io.StringIO()))
