"""Turn a decoded RGB image into the network's input array, as the backbone's manifest entry says."""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from PIL import Image

_INTERPOLATION = {
    "bicubic": Image.Resampling.BICUBIC,
    "bilinear": Image.Resampling.BILINEAR,
    "nearest": Image.Resampling.NEAREST,
}


@dataclass(frozen=True)
class Preprocessing:
    """Resize the shorter side, centre-crop a square, then (x - mean) / std on RGB 0..255."""

    resize_shorter: int
    crop: int
    interpolation: str
    mean: tuple[float, float, float]
    std: tuple[float, float, float]

    @classmethod
    def from_dict(cls, data: dict) -> "Preprocessing":
        interpolation = data.get("interpolation", "bicubic")
        if interpolation not in _INTERPOLATION:
            raise ValueError(f"interpolation must be one of {sorted(_INTERPOLATION)}, got: {interpolation!r}")
        return cls(
            resize_shorter=int(data["resize_shorter"]),
            crop=int(data["crop"]),
            interpolation=interpolation,
            mean=tuple(float(v) for v in data["mean"]),
            std=tuple(float(v) for v in data["std"]),
        )

    def to_dict(self) -> dict:
        data = asdict(self)
        data["mean"] = list(self.mean)
        data["std"] = list(self.std)
        return data

    def resize_and_crop(self, image: Image.Image) -> Image.Image:
        """Shorter side to `resize_shorter`, then the centred `crop` x `crop` square."""
        w, h = image.size
        scale = self.resize_shorter / min(w, h)
        # Round like torchvision's Resize so results match the usual pipelines.
        new_w, new_h = (self.resize_shorter, max(1, int(h * scale))) if w <= h else (max(1, int(w * scale)), self.resize_shorter)
        if (new_w, new_h) != (w, h):
            image = image.resize((new_w, new_h), _INTERPOLATION[self.interpolation])
        left = int(round((new_w - self.crop) / 2.0))
        top = int(round((new_h - self.crop) / 2.0))
        return image.crop((left, top, left + self.crop, top + self.crop))

    def to_array(self, image: Image.Image) -> np.ndarray:
        """(3, crop, crop) float32, normalised."""
        pixels = np.asarray(self.resize_and_crop(image), dtype=np.float32)
        mean = np.asarray(self.mean, dtype=np.float32)
        std = np.asarray(self.std, dtype=np.float32)
        return np.ascontiguousarray(((pixels - mean) / std).transpose(2, 0, 1))
