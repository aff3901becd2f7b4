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

    def resize(self, image: Image.Image) -> Image.Image:
        """Shorter side to `resize_shorter` (the image itself when it already has that size)."""
        w, h = image.size
        scale = self.resize_shorter / min(w, h)
        # Round like torchvision's Resize so results match the usual pipelines.
        new_w, new_h = (self.resize_shorter, max(1, int(h * scale))) if w <= h else (max(1, int(w * scale)), self.resize_shorter)
        if (new_w, new_h) != (w, h):
            image = image.resize((new_w, new_h), _INTERPOLATION[self.interpolation])
        return image

    def crop_centre(self, image: Image.Image) -> Image.Image:
        """The centred `crop` x `crop` square of an image resized by `resize`."""
        new_w, new_h = image.size
        left = int(round((new_w - self.crop) / 2.0))
        top = int(round((new_h - self.crop) / 2.0))
        return image.crop((left, top, left + self.crop, top + self.crop))

    def resize_and_crop(self, image: Image.Image) -> Image.Image:
        """Shorter side to `resize_shorter`, then the centred `crop` x `crop` square."""
        return self.crop_centre(self.resize(image))

    def normalise(self, image: Image.Image) -> np.ndarray:
        """An RGB image of the crop's size -> (3, crop, crop) float32, (x - mean) / std per channel.

        Through a 256-entry table per channel built with the same float32 operations as the
        direct formula, so the values are bit for bit those of ((x - mean) / std), at a third of
        the memory traffic.
        """
        pixels = np.asarray(image, dtype=np.uint8)
        tables = self._tables()
        out = np.empty((3,) + pixels.shape[:2], dtype=np.float32)
        for c in range(3):
            np.take(tables[c], pixels[..., c], out=out[c])
        return out

    def _tables(self) -> np.ndarray:
        tables = _TABLES.get(self)
        if tables is None:
            levels = np.arange(256, dtype=np.float32)[:, None]
            mean = np.asarray(self.mean, dtype=np.float32)
            std = np.asarray(self.std, dtype=np.float32)
            tables = _TABLES[self] = np.ascontiguousarray(((levels - mean) / std).T)
        return tables

    def to_array(self, image: Image.Image) -> np.ndarray:
        """(3, crop, crop) float32, normalised."""
        return self.normalise(self.resize_and_crop(image))


_TABLES: dict[Preprocessing, np.ndarray] = {}   # per preprocessing: (3, 256) float32 lookup tables
