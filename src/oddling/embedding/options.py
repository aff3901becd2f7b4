"""How a job runs its representation (runtime, precision, batches, threads, cache, Dask): `RunOptions`."""
from __future__ import annotations

import os
from dataclasses import dataclass

from oddling.errors import OddlingError


@dataclass
class RunOptions:
    """How to run the representation; shared by every job that reads images."""

    cache_dir: str | os.PathLike | None = None
    runtime: str = "auto"      # "auto" (OpenVINO, else ONNX Runtime, else PyTorch), "openvino", "onnx" or "torch"
    batch_size: int = 32
    workers: int | None = None
    progress: bool = True
    use_cache: bool = True     # reuse and save features in <cache>/embeddings
    precision: str = "fp32"    # "bf16": OpenVINO only, checked against fp32 on the first batch
    dask: str | None = None    # a Dask scheduler's address: embed on its workers (embedding/cluster.py)

    def __post_init__(self):
        # The precision travels inside the runtime text ("openvino:bf16"), so every job that
        # passes `runtime` to load_representation passes the precision with it.
        runtime, _, folded = str(self.runtime).partition(":")
        if folded and self.precision not in ("fp32", folded):
            raise OddlingError(f"runtime {self.runtime!r} contradicts precision {self.precision!r}")
        self.precision = folded or self.precision
        self.runtime = runtime if self.precision == "fp32" else f"{runtime}:{self.precision}"
