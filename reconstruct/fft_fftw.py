"""FFTW through pyfftw for the FFT plans: 64-byte aligned buffers, the in-place forward and backward
plans of one FFTPlan (made once, run under a lock), and the on-disk cache (FFTW wisdom, beside it the
backend ranking of ``fft_choice``) under ``$MASKRUN_FFT_CACHE`` or ``~/.cache/maskrun``."""
from __future__ import annotations

import json
import os
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

try:  # FFTW: a dependency where pyfftw has wheels (pyproject marker); numpy/scipy otherwise
    import pyfftw as _pyfftw
except ImportError:  # pragma: no cover - depends on the platform
    _pyfftw = None

_LOCK = threading.RLock()  # FFTW planning and the backend choice
_ALIGN = 64


def aligned_empty(shape, dtype) -> np.ndarray:
    """An uninitialised C-contiguous array whose data start on a 64-byte boundary (FFTW's SIMD plans want it)."""
    dtype = np.dtype(dtype)
    n = int(np.prod(shape)) * dtype.itemsize
    raw = np.empty(n + _ALIGN, np.uint8)
    off = (-raw.ctypes.data) % _ALIGN
    return raw[off:off + n].view(dtype).reshape(shape)


# --- cache on disk: FFTW wisdom and the backend ranking ---------------------------------------
def _cache_dir() -> Path:
    d = os.environ.get("MASKRUN_FFT_CACHE")
    if d:
        return Path(d)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "maskrun"


def wisdom_path() -> Path:
    """Where the FFTW wisdom is kept (``$MASKRUN_FFT_CACHE`` or ``~/.cache/maskrun``)."""
    return _cache_dir() / "fftw-wisdom.json"


def _ranking_path() -> Path:
    return _cache_dir() / "fft-ranking.json"


def _versions() -> str:
    import scipy

    try:  # the version string only: whether mkl_fft is used is decided in fft_backends
        import mkl_fft as _mkl_fft
    except ImportError:
        _mkl_fft = None
    parts = [f"numpy {np.__version__}", f"scipy {scipy.__version__}"]
    if _pyfftw is not None:
        parts.append(f"pyfftw {_pyfftw.__version__}")
    if _mkl_fft is not None:
        parts.append(f"mkl_fft {getattr(_mkl_fft, '__version__', '?')}")
    return "; ".join(parts)


def _read_json(path: Path) -> dict:
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return {}


def _write_json(path: Path, obj: dict) -> None:
    """Atomic write; a cache that cannot be written is only a cache (silently skipped)."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.{threading.get_ident()}")
        tmp.write_text(json.dumps(obj))
        os.replace(tmp, path)
    except OSError:
        pass


_WISDOM_LOADED = False


def _load_wisdom() -> None:
    global _WISDOM_LOADED
    if _WISDOM_LOADED or _pyfftw is None:
        return
    _WISDOM_LOADED = True
    w = _read_json(wisdom_path())
    if w.get("versions") == _versions() and isinstance(w.get("wisdom"), list):
        try:
            _pyfftw.import_wisdom(tuple(bytes.fromhex(s) for s in w["wisdom"]))
        except (ValueError, TypeError):
            pass


def _save_wisdom() -> None:
    if _pyfftw is None:
        return
    _write_json(wisdom_path(), {"versions": _versions(), "wisdom": [b.hex() for b in _pyfftw.export_wisdom()]})


# --- FFTW plans ---------------------------------------------------------------------------------
@dataclass
class _FFTWPlans:
    """Forward and backward FFTW plans for one (shape, dtype, threads), in place, made once."""

    shape: tuple
    dtype: np.dtype
    threads: int
    plans: dict = field(default_factory=dict)
    # A pyfftw plan holds its arrays: update_arrays + execute from two threads at once would
    # transform one thread's buffer into the other's (seen as wrong solver results when two chunks
    # of the same shape shared one plan). Each FFTPlan owns its plans; the lock guards the rest.
    lock: threading.Lock = field(default_factory=threading.Lock)

    def _plan(self, inverse: bool, aligned: bool):
        key = (inverse, aligned)
        p = self.plans.get(key)
        if p is None:
            with _LOCK:
                _load_wisdom()
                scratch = aligned_empty(self.shape, self.dtype) if aligned else self._misaligned()
                flags = ("FFTW_MEASURE", "FFTW_DESTROY_INPUT") + (() if aligned else ("FFTW_UNALIGNED",))
                p = _pyfftw.FFTW(scratch, scratch, axes=(-2, -1),
                                 direction="FFTW_BACKWARD" if inverse else "FFTW_FORWARD",
                                 flags=flags, threads=self.threads, planning_timelimit=10.0)
                self.plans[key] = p
                _save_wisdom()
        return p

    def _misaligned(self) -> np.ndarray:
        n = int(np.prod(self.shape))
        raw = aligned_empty((n + 1,), self.dtype)
        return raw[1:].reshape(self.shape)

    def run(self, buf: np.ndarray, inverse: bool) -> None:
        aligned = buf.ctypes.data % _ALIGN == 0
        p = self._plan(inverse, aligned)
        with self.lock:
            p.update_arrays(buf, buf)
            p.execute()


_FFTW_PLANS: dict[tuple, _FFTWPlans] = {}


def _fftw_plans(shape, dtype, threads) -> _FFTWPlans:
    key = (tuple(shape), np.dtype(dtype).str, threads)
    with _LOCK:
        if key not in _FFTW_PLANS:
            _FFTW_PLANS[key] = _FFTWPlans(tuple(shape), np.dtype(dtype), threads)
        return _FFTW_PLANS[key]
