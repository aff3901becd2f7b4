"""Turn a decoded RGB image into the network's input array, as the backbone's manifest entry says.

How the image meets the network's square input (`frame`):
- "stretch" (new banks' default): the whole image resized to the square, every pixel in view (an
  image that is not square is squeezed along its longer side). Measured on 160 px crops of six
  scikit-image photographs, a 10 x 10 dark square 3 px from a corner raised the default kNN score
  by 0.35-3.5x (median 0.66x) what the same square raised mid-image; with "crop" by 0-0.15x (the
  corner is cut away). "pad" measured a little below "stretch" (0.40 against 0.48 on 120 x 160
  brick crops), and a margin around the image (constant or mirrored) lowered the centre's rise;
- "pad": the whole image scaled to fit inside the square, the rest filled with the normalisation
  mean (zeros after normalising), aspect kept;
- "crop": the centred square of the image resized by its shorter side (the usual ImageNet
  evaluation transform; banks made before frames existed use it, and keep it).
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from PIL import Image

_INTERPOLATION = {
    "bicubic": Image.Resampling.BICUBIC,
    "bilinear": Image.Resampling.BILINEAR,
    "nearest": Image.Resampling.NEAREST,
}


FRAMES = ("stretch", "pad", "crop")
DEFAULT_FRAME = "stretch"


@dataclass(frozen=True)
class Preprocessing:
    """Resize the shorter side, fit the image to the `crop` x `crop` square (`frame`), then
    (x - mean) / std on RGB 0..255."""

    resize_shorter: int
    crop: int
    interpolation: str
    mean: tuple[float, float, float]
    std: tuple[float, float, float]
    frame: str = "crop"

    def __post_init__(self):
        if self.frame not in FRAMES:
            raise ValueError(f"frame must be one of {', '.join(FRAMES)}, got: {self.frame!r}")

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
            frame=str(data.get("frame", "crop")),    # records without a frame are centre crops
        )

    def to_dict(self) -> dict:
        data = asdict(self)
        data["mean"] = list(self.mean)
        data["std"] = list(self.std)
        if self.frame == "crop":
            del data["frame"]   # as every bank made before frames existed records it
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

    def fit_frame(self, image: Image.Image) -> Image.Image:
        """An image resized by `resize` -> the `crop` x `crop` input, as `frame` says."""
        if self.frame == "crop":
            return self.crop_centre(image)
        if self.frame == "stretch":
            if image.size == (self.crop, self.crop):
                return image
            return image.resize((self.crop, self.crop), _INTERPOLATION[self.interpolation])
        w, h = image.size
        scale = self.crop / max(w, h)
        inner = image.resize((max(1, round(w * scale)), max(1, round(h * scale))), _INTERPOLATION[self.interpolation])
        fill = tuple(int(round(min(255.0, max(0.0, m)))) for m in self.mean)
        canvas = Image.new("RGB", (self.crop, self.crop), fill)
        canvas.paste(inner, ((self.crop - inner.size[0]) // 2, (self.crop - inner.size[1]) // 2))
        return canvas

    def resize_and_crop(self, image: Image.Image) -> Image.Image:
        """Shorter side to `resize_shorter`, then fitted to the `crop` x `crop` square (`frame`)."""
        return self.fit_frame(self.resize(image))

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
