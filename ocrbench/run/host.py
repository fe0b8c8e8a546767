"""What the planner needs to know about the machine and engine a run was measured on."""

from __future__ import annotations

import os
import platform
import socket
from pathlib import Path

from ocrbench.recognisers.base import Recogniser


def cpu_model() -> str:
    """The CPU's model name (Linux: /proc/cpuinfo), else what the platform module says."""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def physical_cores() -> int | None:
    """Physical cores (psutil, optional), None when unknown."""
    try:
        import psutil

        return psutil.cpu_count(logical=False)
    except Exception:  # noqa: BLE001 - psutil is optional here
        return None


def ort_version() -> str:
    import onnxruntime as ort

    return ort.__version__


def host_info(rec: Recogniser) -> dict:
    """The host description stored with a run (``runs.host_json``)."""
    return {"cpu_model": cpu_model(), "cores": os.cpu_count(), "physical_cores": physical_cores(),
            "os": platform.platform(), "python": platform.python_version(), "onnxruntime": ort_version(),
            "providers": rec.providers, "provider_warnings": rec.provider_warnings,
            "intra_threads": rec.options.intra_threads,
            "inter_threads": rec.options.inter_threads, "hostname": socket.gethostname()}
