"""Which device a transformer runs its forward pass on: auto, cpu, cuda or cuda:N.

``auto`` is CUDA when torch sees a GPU, else the CPU. On a CPU-only build of torch
(its version ends in ``+cpu``) that is known without importing torch, so plans and
sweep errors stay fast there.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import metadata

from harness.errors import DataError

DEVICE_PATTERN = r"^(auto|cpu|cuda(:\d+)?)$"
DEVICE_CHOICES = "auto, cpu, cuda or cuda:N"


@dataclass(frozen=True)
class Device:
    name: str  # what torch is given: "cpu", "cuda:0"
    hardware: str  # "cpu", or the GPU's model name as torch reports it

    @property
    def key(self) -> str:
        """What enters the encode key: the kind of hardware, not its index (two identical GPUs give the same vectors)."""
        return "cpu" if self.name == "cpu" else f"cuda/{self.hardware}"

    @property
    def label(self) -> str:
        """The ``harness.device`` tag of a run."""
        return "cpu" if self.name == "cpu" else f"{self.name} ({self.hardware})"


CPU = Device("cpu", "cpu")


def _torch_build_is_cpu_only() -> bool:
    try:
        return metadata.version("torch").endswith("+cpu")
    except metadata.PackageNotFoundError:
        return False


def resolved_device(requested: str) -> Device:
    """The device a request names on this machine; a CUDA request torch cannot serve is one line."""
    if requested == "cpu" or (requested == "auto" and _torch_build_is_cpu_only()):
        return CPU
    import torch

    if not torch.cuda.is_available():
        if requested == "auto":
            return CPU
        raise DataError(f"device '{requested}' was asked for, but torch {torch.__version__} sees no CUDA GPU on this "
                        "machine; use device: auto (CUDA when there is one, else the CPU) or cpu")
    count = torch.cuda.device_count()
    index = torch.cuda.current_device() if requested in ("auto", "cuda") else int(requested.split(":", 1)[1])
    if index >= count:
        raise DataError(f"device '{requested}': torch sees {count} CUDA GPU{'s' if count > 1 else ''} "
                        f"(cuda:0 to cuda:{count - 1})")
    return Device(f"cuda:{index}", torch.cuda.get_device_name(index))
