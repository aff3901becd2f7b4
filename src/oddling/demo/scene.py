"""The invented demo scenario: a line camera looking down on glazed ceramic tiles on a conveyor.

Seeded and deterministic, numpy + Pillow only. Normal tiles vary in glaze, pose, lighting and
focus so that a detector has honest work to do; each anomaly kind is a defect a person would
recognise, drawn on an otherwise normal tile.
"""
from __future__ import annotations

import csv
import math
from dataclasses import dataclass, fields
from functools import lru_cache
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

ANOMALY_KINDS = ("hairline_crack", "chipped_corner", "glaze_drip", "foreign_object", "blank_frame",
                 "overexposed_frame")
NORMAL = "normal"
TRUTH_FILE = "incoming_truth.csv"
JPEG_QUALITY = 92

# Glaze families (sRGB, 0..1); each tile jitters around one of them.
GLAZES = ((0.92, 0.88, 0.78),   # cream
          (0.86, 0.78, 0.63),   # sand
          (0.75, 0.84, 0.91))   # pale blue
_BISCUIT = (0.80, 0.69, 0.56)   # unglazed ceramic body, seen where a corner broke off
_STEEL = (0.60, 0.62, 0.66)
_WOOD = (0.66, 0.50, 0.31)

# Seed streams: each image's randomness depends only on (seed, stream, ...), not on the counts
# of the other folders, so enlarging one folder leaves the others' files unchanged.
_REFERENCE, _INCOMING, _TEST, _SHUFFLE = range(4)
_SUPERSAMPLE = 4               # drawing resolution for thin lines and polygons (anti-aliasing)


@dataclass(frozen=True)
class SceneCounts:
    """How many images `generate_scene` writes to each folder."""

    reference: int = 160        # normal tiles for the bank
    incoming_normal: int = 40
    incoming_anomalous: int = 12  # spread over the kinds, in ANOMALY_KINDS order
    test_normal: int = 80
    test_per_kind: int = 10


@dataclass(frozen=True)
class _Pose:
    """Where the tile lies: centre, half side and rotation (pixels, radians), corner rounding."""

    cx: float
    cy: float
    half: float
    angle: float
    radius: float

    def to_local(self, x, y):
        return _to_frame(x, y, self.cx, self.cy, self.angle)

    def to_image(self, u, v):
        c, s = math.cos(self.angle), math.sin(self.angle)
        return self.cx + c * u - s * v, self.cy + s * u + c * v


def _to_frame(x, y, cx: float, cy: float, angle: float):
    """Image coordinates to those of a frame centred at (cx, cy) and turned by `angle`."""
    c, s = math.cos(angle), math.sin(angle)
    dx, dy = x - cx, y - cy
    return c * dx + s * dy, -s * dx + c * dy


# ---------------------------------------------------------------------------------------------
# Public API


def render_tile(rng: np.random.Generator, size: int = 320, kind: str | None = None) -> Image.Image:
    """One camera frame of a tile on the belt, as an RGB image of `size` x `size`.

    `kind` is None for a normal tile or one of ANOMALY_KINDS. The call advances `rng` by the
    same fixed draw whatever the kind, and a defect takes its randomness from its own stream:
    the same rng state gives the same tile, belt, lighting and camera noise with or without
    the defect.
    """
    if kind is not None and kind not in ANOMALY_KINDS:
        raise ValueError(f"kind must be None or one of {ANOMALY_KINDS}, got: {kind!r}")
    _check_size(size)
    scene_seed, defect_seed, camera_seed = (int(s) for s in rng.integers(0, 2**62, size=3))
    scene, defect, camera = (np.random.default_rng(s) for s in (scene_seed, defect_seed, camera_seed))
    if kind == "blank_frame":
        return Image.fromarray(_blank_frame(camera, size))
    pixels = _scene(scene, defect, size, kind)
    return Image.fromarray(_camera(camera, pixels, overexposed=kind == "overexposed_frame"))


def generate_scene(root: Path, seed: int = 0, counts: SceneCounts = SceneCounts(),
                   size: int = 320) -> dict:
    """Write the demo folders under `root` and return what was written.

    Layout: ``reference/tile_NNNNN.jpg`` (normal tiles for the bank), ``incoming/frame_NNNNN.jpg``
    (normal and anomalous tiles shuffled by `seed`; names do not reveal the label),
    ``test/normal/*.jpg`` and ``test/<kind>/*.jpg`` (labelled by folder), and ``incoming_truth.csv``
    with columns ``path,label,kind``: path relative to ``incoming/`` (as in oddling's scores CSV),
    label ``normal`` or ``anomalous``, kind ``normal`` or one of ANOMALY_KINDS. JPEG quality 92.

    Refuses with FileExistsError if `root` exists and is not an empty folder; the caller clears it.
    The same seed, counts and size give byte-identical files.

    Returns ``{"root": str, "reference": n, "incoming": n, "incoming_anomalous": n,
    "test": {"normal": n, kind: n, ...}}``.
    """
    root = Path(root)
    _check_counts(counts)
    _check_size(size)
    if not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got: {seed!r}")
    if root.exists() and (not root.is_dir() or any(root.iterdir())):
        raise FileExistsError(f"{root} exists and is not an empty folder; clear it or choose another")

    def write(image: Image.Image, path: Path) -> None:
        image.save(path, format="JPEG", quality=JPEG_QUALITY)

    def folder(*parts: str) -> Path:
        path = root.joinpath(*parts)
        path.mkdir(parents=True, exist_ok=True)
        return path

    reference = folder("reference")
    for i in range(counts.reference):
        write(render_tile(_image_rng(seed, _REFERENCE, i), size), reference / f"tile_{i:05d}.jpg")

    incoming_kinds = [NORMAL] * counts.incoming_normal + [
        ANOMALY_KINDS[i % len(ANOMALY_KINDS)] for i in range(counts.incoming_anomalous)]
    order = _image_rng(seed, _SHUFFLE).permutation(len(incoming_kinds))
    incoming = folder("incoming")
    truth = []
    for i, (kind, frame) in enumerate(zip(incoming_kinds, order)):
        name = f"frame_{frame:05d}.jpg"
        write(render_tile(_image_rng(seed, _INCOMING, i), size, None if kind == NORMAL else kind),
              incoming / name)
        truth.append((name, NORMAL if kind == NORMAL else "anomalous", kind))
    with open(root / TRUTH_FILE, "w", newline="", encoding="utf-8") as f:
        writer = csv.writer(f, lineterminator="\n")
        writer.writerow(["path", "label", "kind"])
        writer.writerows(sorted(truth))

    test = {NORMAL: counts.test_normal, **{k: counts.test_per_kind for k in ANOMALY_KINDS}}
    for k, (kind, n) in enumerate(test.items()):
        out = folder("test", kind)
        for i in range(n):
            write(render_tile(_image_rng(seed, _TEST, k, i), size, None if kind == NORMAL else kind),
                  out / f"tile_{i:05d}.jpg")
    return {"root": str(root), "reference": counts.reference, "incoming": len(incoming_kinds),
            "incoming_anomalous": counts.incoming_anomalous, "test": test}


# ---------------------------------------------------------------------------------------------
# Validation and seeding


def _check_size(size: int) -> None:
    if not isinstance(size, (int, np.integer)) or size < 32:
        raise ValueError(f"size must be an integer >= 32, got: {size!r}")


def _check_counts(counts: SceneCounts) -> None:
    for f in fields(SceneCounts):
        value = getattr(counts, f.name)
        if not isinstance(value, (int, np.integer)) or value < 0:
            raise ValueError(f"counts.{f.name} must be a non-negative integer, got: {value!r}")


def _image_rng(seed: int, *key: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=key))


# ---------------------------------------------------------------------------------------------
# Drawing helpers (float32 images in 0..1)


@lru_cache(maxsize=4)
def _grid(size: int) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre coordinates (x, y), read-only so the cache cannot be corrupted."""
    y, x = np.mgrid[0:size, 0:size].astype(np.float32) + np.float32(0.5)
    x.setflags(write=False)
    y.setflags(write=False)
    return x, y


def _smooth_noise(rng: np.random.Generator, size: int, cells: int) -> np.ndarray:
    """Low-frequency noise of roughly unit spread: a random grid upsampled bicubically."""
    grid = rng.standard_normal((cells + 1, cells + 1), dtype=np.float32)
    return np.asarray(Image.fromarray(grid).resize((size, size), Image.Resampling.BICUBIC))


def _coverage(sdf: np.ndarray) -> np.ndarray:
    """Anti-aliased inside-ness from a signed distance in pixels (negative inside)."""
    return np.clip(0.5 - sdf, 0.0, 1.0)


def _box_sdf(u: np.ndarray, v: np.ndarray, half_u: float, half_v: float, radius: float = 0.0):
    qu = np.abs(u) - (half_u - radius)
    qv = np.abs(v) - (half_v - radius)
    outside = np.hypot(np.maximum(qu, 0), np.maximum(qv, 0))
    return outside + np.minimum(np.maximum(qu, qv), 0) - radius


def _blur_mask(mask: np.ndarray, radius: float) -> np.ndarray:
    image = Image.fromarray(np.round(mask * 255).astype(np.uint8))
    return np.asarray(image.filter(ImageFilter.GaussianBlur(radius)), dtype=np.float32) / 255


def _shift(mask: np.ndarray, dx: float, dy: float) -> np.ndarray:
    """mask moved by whole pixels; the content near the frame edge is background anyway."""
    return np.roll(mask, (int(round(dy)), int(round(dx))), axis=(0, 1))


def _draw_mask(size: int, draw) -> np.ndarray:
    """Coverage of shapes drawn by `draw(ImageDraw, scale)` at a higher resolution, box-filtered."""
    big = Image.new("L", (size * _SUPERSAMPLE, size * _SUPERSAMPLE), 0)
    draw(ImageDraw.Draw(big), _SUPERSAMPLE)
    small = big.resize((size, size), Image.Resampling.BOX)
    return np.asarray(small, dtype=np.float32) / 255


def _lerp(a: np.ndarray, b, t: np.ndarray) -> np.ndarray:
    return a + (np.asarray(b, dtype=np.float32) - a) * t[..., None]


# ---------------------------------------------------------------------------------------------
# The scene


def _scene(rng: np.random.Generator, defect: np.random.Generator, size: int, kind: str | None):
    scale = size / 320
    x, y = _grid(size)

    # Conveyor belt: dark rubber with transverse ridges, wear and grain.
    grey = rng.uniform(0.13, 0.22)
    tint = grey * (1 + rng.normal(0, 0.04, 3))
    period, phase = rng.uniform(4.0, 7.0) * scale, rng.uniform(0, 2 * np.pi)
    texture = (1 + rng.uniform(0.03, 0.07) * np.sin(2 * np.pi * y / period + phase)
               + 0.06 * _smooth_noise(rng, size, 5)
               + 0.04 * rng.standard_normal((size, size), dtype=np.float32))
    belt = texture[..., None] * tint.astype(np.float32)

    # Tile pose and light.
    pose = _Pose(cx=size / 2 + rng.uniform(-0.04, 0.04) * size,
                 cy=size / 2 + rng.uniform(-0.04, 0.04) * size,
                 half=rng.uniform(0.33, 0.37) * size,
                 angle=math.radians(rng.uniform(-4, 4)),
                 radius=rng.uniform(1.5, 4.0) * scale)
    theta = rng.uniform(0, 2 * np.pi)
    light = np.array([math.cos(theta), math.sin(theta)], dtype=np.float32)
    u, v = pose.to_local(x, y)
    sdf = _box_sdf(u, v, pose.half, pose.half, pose.radius)
    mask = _coverage(sdf)

    # Glaze: colour family with jitter, mottling, fine speckle and sparse iron specks.
    glaze = (np.array(GLAZES[rng.integers(len(GLAZES))]) * (1 + rng.normal(0, 0.02))
             + rng.normal(0, 0.012, 3)).astype(np.float32)
    shade = (1 + 0.015 * _smooth_noise(rng, size, 6) + 0.01 * _smooth_noise(rng, size, 24)
             + rng.uniform(0.006, 0.014) * rng.standard_normal((size, size), dtype=np.float32))
    n_specks = rng.poisson(rng.uniform(0.0005, 0.002) * size * size)
    specks = np.zeros(size * size, dtype=np.float32)
    specks[rng.integers(0, size * size, n_specks)] = rng.uniform(0.1, 0.3, n_specks)
    specks = specks.reshape(size, size)

    # Soft bevel: the rounded edge facing the light is brighter, the far edge darker.
    bevel_width = rng.uniform(3, 6) * scale
    profile = np.clip(1 + sdf / bevel_width, 0, 1) ** 1.5
    gy, gx = np.gradient(sdf)
    shade *= 1 + profile * (0.22 * (gx * light[0] + gy * light[1]) - 0.06)
    tile = shade[..., None] * glaze * (1 - specks[..., None] * np.array([0.9, 1.0, 1.2], np.float32))

    light_strength = rng.uniform(0.04, 0.22)
    shadow_offset, shadow_blur = rng.uniform(2, 5) * scale, rng.uniform(1.5, 3.5) * scale
    shadow_depth, vignette = rng.uniform(0.35, 0.55), rng.uniform(0.03, 0.10)

    # Defects that change the tile itself.
    if kind == "hairline_crack":
        crack = _crack(defect, pose, size) * mask
        tile *= (1 - defect.uniform(0.5, 0.7) * crack)[..., None]
    elif kind == "glaze_drip":
        tile = _glaze_drip(defect, pose, size, tile, glaze, light)
    elif kind == "chipped_corner":
        missing, body = _chip(defect, pose, size)
        grain = 1 + 0.05 * defect.standard_normal((size, size), dtype=np.float32)
        biscuit = np.array(_BISCUIT, np.float32) * (1 + defect.normal(0, 0.03))
        tile = _lerp(tile, biscuit * grain[..., None], body * mask)
        mask = mask * (1 - missing)

    shadow = _blur_mask(_shift(mask, -light[0] * shadow_offset, -light[1] * shadow_offset), shadow_blur)
    belt *= (1 - shadow_depth * shadow)[..., None]
    image = _lerp(belt, 0, mask) + tile * mask[..., None]

    if kind == "foreign_object":
        image = _foreign_object(defect, pose, size, image, light)

    # Lighting gradient across the frame and a mild lens vignette.
    r2 = ((x - size / 2) ** 2 + (y - size / 2) ** 2) / (size / 2) ** 2
    gain = (1 + light_strength * ((x - pose.cx) * light[0] + (y - pose.cy) * light[1]) / (size / 2)
            - vignette * r2)
    return image * gain[..., None]


def _camera(rng: np.random.Generator, image: np.ndarray, overexposed: bool) -> np.ndarray:
    """Optics blur, exposure, sensor noise and 8-bit quantisation."""
    size = image.shape[0]
    blurred = Image.fromarray(_to_uint8(image)).filter(
        ImageFilter.GaussianBlur(rng.uniform(0.35, 1.0) * size / 320))
    image = np.asarray(blurred, dtype=np.float32) / 255
    sigma = rng.uniform(0.005, 0.012)
    noise = rng.standard_normal(image.shape, dtype=np.float32)
    if overexposed:
        # Saturated sensor: a large gain and offset push everything towards white.
        image = image * rng.uniform(2.6, 3.6) + rng.uniform(0.25, 0.4)
    return _to_uint8(image + sigma * (0.5 + np.sqrt(np.clip(image, 0, 1))) * noise)


def _to_uint8(image: np.ndarray) -> np.ndarray:
    return (np.clip(image, 0, 1) * 255 + 0.5).astype(np.uint8)


def _blank_frame(rng: np.random.Generator, size: int) -> np.ndarray:
    """No tile, no light: dark level, row and column fixed-pattern noise, read noise."""
    level = rng.uniform(0.02, 0.07)
    image = (level + rng.normal(0, 0.004, (size, 1, 1)) + rng.normal(0, 0.003, (1, size, 1))
             + rng.uniform(0.008, 0.02) * rng.standard_normal((size, size, 3), dtype=np.float32))
    return _to_uint8(image)


# ---------------------------------------------------------------------------------------------
# Defects


def _crack(rng: np.random.Generator, pose: _Pose, size: int) -> np.ndarray:
    """Coverage of a thin jagged crack running in from an edge, sometimes with one branch."""
    h, scale = pose.half, size / 320
    side = rng.integers(4)
    t = rng.uniform(-0.7, 0.7) * h
    start, heading = [((t, -h - 2), np.pi / 2), ((h + 2, t), np.pi), ((t, h + 2), -np.pi / 2),
                      ((-h - 2, t), 0.0)][side]
    heading += rng.uniform(-0.5, 0.5)
    main = _jagged(rng, start, heading, rng.uniform(0.35, 0.7) * 2 * h, h, scale)
    paths = [main]
    if rng.random() < 0.6 and len(main) > 4:
        fork = main[rng.integers(len(main) // 3, len(main) - 1)]
        paths.append(_jagged(rng, fork, heading + rng.choice([-1, 1]) * rng.uniform(0.5, 1.0),
                             rng.uniform(0.15, 0.3) * 2 * h, h, scale))
    width = rng.uniform(1.2, 2.0) * scale

    def draw(canvas: ImageDraw.ImageDraw, k: int) -> None:
        for path in paths:
            points = [tuple(k * c for c in pose.to_image(pu, pv)) for pu, pv in path]
            canvas.line(points, fill=255, width=max(1, round(width * k)), joint="curve")
    return _draw_mask(size, draw)


def _jagged(rng, start, heading, length, half, scale):
    """A random-walk polyline in tile coordinates that keeps its general direction and stays on the tile."""
    points, (pu, pv), walked, direction = [start], start, 0.0, heading
    while walked < length:
        step = rng.uniform(3, 8) * scale
        direction = heading + np.clip(direction - heading + rng.normal(0, 0.45), -0.8, 0.8)
        pu, pv = pu + step * math.cos(direction), pv + step * math.sin(direction)
        if max(abs(pu), abs(pv)) > half + 2:
            break
        points.append((pu, pv))
        walked += step
    return points


def _chip(rng: np.random.Generator, pose: _Pose, size: int) -> tuple[np.ndarray, np.ndarray]:
    """A broken-off corner: (missing, body), the gone region and the exposed-body band along the break."""
    h = pose.half
    su, sv = rng.choice([-1, 1], size=2)
    leg_u, leg_v = rng.uniform(0.14, 0.24, size=2) * 2 * h
    a = np.array([su * (h - leg_u), sv * h])          # where the break meets one edge
    b = np.array([su * h, sv * (h - leg_v)])          # ... and the other
    inward = -np.array([su, sv]) / math.sqrt(2)
    t = np.linspace(0, 1, 14)[1:-1, None]
    bulge = rng.uniform(-0.1, 0.3) * min(leg_u, leg_v)
    jitter = rng.normal(0, 1.3, (len(t), 2)) * size / 320
    curve = a + t * (b - a) + bulge * np.sin(np.pi * t) * inward + jitter
    band = rng.uniform(2.0, 4.0) * size / 320
    out = 14 * size / 320
    far = [(su * (h + out), sv * (h - leg_v)), (su * (h + out), sv * (h + out)),
           (su * (h - leg_u), sv * (h + out))]

    def polygon(shift: float):
        """The region beyond the break line, the line moved `shift` pixels into the tile."""
        line = np.vstack([a, curve, b]) + shift * inward
        return [tuple(p) for p in line] + far

    def drawer(ring):
        def draw(canvas: ImageDraw.ImageDraw, k: int) -> None:
            canvas.polygon([tuple(k * c for c in pose.to_image(pu, pv)) for pu, pv in ring], fill=255)
        return draw
    missing = _draw_mask(size, drawer(polygon(0.0)))
    body = _draw_mask(size, drawer(polygon(band))) - missing
    return missing, np.clip(body, 0, 1)


def _glaze_drip(rng, pose: _Pose, size: int, tile: np.ndarray, glaze: np.ndarray, light: np.ndarray):
    """An elongated run of thicker, darker glaze ending in a drop, with a specular highlight."""
    h = pose.half
    side = 2 * h
    centre = rng.uniform(-0.5, 0.5, 2) * h
    direction = rng.uniform(0, 2 * np.pi)
    length = rng.uniform(0.15, 0.25) * side
    r_head = rng.uniform(0.035, 0.05) * side
    r_tail = r_head * rng.uniform(0.45, 0.7)
    bend = rng.uniform(-0.25, 0.25)
    t = np.linspace(0, 1, 18)
    angle = direction + bend * t
    steps = np.stack([np.cos(angle), np.sin(angle)], 1) * (length / (len(t) - 1))
    path = centre + np.cumsum(steps, 0) - steps[0]
    radii = r_tail + (r_head - r_tail) * t ** 1.5

    # Work in a window around the drip: the distance field over the whole frame would be wasted.
    px, py = pose.to_image(path[:, 0], path[:, 1])
    pad = r_head + 3
    x0, x1 = int(max(px.min() - pad, 0)), int(min(px.max() + pad, size))
    y0, y1 = int(max(py.min() - pad, 0)), int(min(py.max() + pad, size))
    x, y = _grid(size)
    wx, wy = x[y0:y1, x0:x1], y[y0:y1, x0:x1]
    # Tapered capsules along the run: a union of discs would leave creases that the relief
    # shading turns into ridges (a caterpillar, not a drip).
    sdf = np.full(wx.shape, np.inf, np.float32)
    for j in range(len(t) - 1):
        ax, ay, dx, dy = px[j], py[j], px[j + 1] - px[j], py[j + 1] - py[j]
        s = np.clip(((wx - ax) * dx + (wy - ay) * dy) / (dx * dx + dy * dy), 0, 1)
        r = radii[j] + (radii[j + 1] - radii[j]) * s
        sdf = np.minimum(sdf, np.hypot(wx - ax - s * dx, wy - ay - s * dy) - r)
    cover = _coverage(sdf)
    dome = np.sqrt(np.clip(-sdf / (0.8 * r_head), 0, 1))
    gy, gx = np.gradient(dome)
    relief = 1 - 3.0 * (gx * light[0] + gy * light[1])    # height rises inwards: lit where it faces the light
    thick = (glaze ** 2.2) * 0.9                        # thicker glaze: deeper, more saturated
    colour = thick * ((1 - 0.15 * dome) * relief)[..., None]
    # Glossy spot on the drop, towards the light, and a fainter streak along the run.
    hx, hy = px[-1] + 0.45 * r_head * light[0], py[-1] + 0.45 * r_head * light[1]
    highlight = 0.35 * np.exp(-((wx - hx) ** 2 + (wy - hy) ** 2) / (0.2 * r_head) ** 2)
    highlight += 0.12 * np.clip(relief - 1, 0, None) * dome
    tile = tile.copy()
    window = tile[y0:y1, x0:x1]
    tile[y0:y1, x0:x1] = _lerp(window, colour, cover) + (highlight * cover)[..., None]
    return tile


def _foreign_object(rng, pose: _Pose, size: int, image: np.ndarray, light: np.ndarray):
    """A steel bolt or a wood chip lying on the tile, with its own small shadow."""
    side = 2 * pose.half
    cu, cv = rng.uniform(-0.55, 0.55, 2) * pose.half
    cx, cy = pose.to_image(cu, cv)
    x, y = _grid(size)
    a, b = _to_frame(x, y, cx, cy, rng.uniform(0, 2 * np.pi))
    if rng.random() < 0.5:
        cover, colour = _bolt(rng, a, b, rng.uniform(0.16, 0.22) * side)
    else:
        cover, colour = _wood_chip(rng, a, b, rng.uniform(0.18, 0.28) * side)
    offset = 3 * size / 320
    shadow = _blur_mask(_shift(cover, -light[0] * offset, -light[1] * offset), 1.5 * size / 320)
    image = image * (1 - 0.45 * shadow)[..., None]
    return _lerp(image, colour, cover)


def _bolt(rng, a, b, length):
    """Hex head at one end, threaded shaft tapering to a point, in the bolt's own frame (a along)."""
    r = length * rng.uniform(0.08, 0.1)
    head_len, head_r = length * 0.2, r * 1.9
    a0 = -length / 2
    head = _box_sdf(a - (a0 + head_len / 2), b, head_len / 2, head_r, 0.8)
    taper = np.clip((length / 2 - a) / (1.5 * r), 0.35, 1.0)
    shaft = _box_sdf(a - (a0 + head_len + (length - head_len) / 2), b / taper,
                     (length - head_len) / 2, r)
    cover = np.maximum(_coverage(head), _coverage(shaft))
    n = np.clip(b / (r * taper), -1, 1)
    cylinder = 0.45 + 0.5 * np.sqrt(1 - n ** 2) + 0.35 * np.exp(-((n + 0.4) / 0.25) ** 2)
    threads = 0.8 + 0.2 * np.cos(2 * np.pi * (a + 0.4 * b) / (0.7 * r))
    nh = np.abs(b) / head_r
    facets = np.where(nh < 0.5, 0.95, np.where(b < 0, 0.7, 0.5))
    on_head = _coverage(head) > _coverage(shaft)
    shade = np.where(on_head, facets, cylinder * threads)
    tint = np.array(_STEEL, np.float32) * (1 + rng.normal(0, 0.04))
    return cover, shade[..., None] * tint


def _wood_chip(rng, a, b, length):
    """A splinter: long and narrow, pointed at one end, ragged edges, grain running along it."""
    width = length * rng.uniform(0.16, 0.26)
    s = np.clip(2 * a / length, -1.5, 1.5)                      # -1 blunt end .. 1 point
    taper = np.where(s < 0, 1 - rng.uniform(0.2, 0.5) * s ** 2, 1 - np.abs(s) ** rng.uniform(1.0, 1.6))
    k = np.arange(3, 9)
    ragged = np.sum((rng.normal(0, 0.06, len(k)) / np.sqrt(k))[:, None, None]
                    * np.sin(np.pi * k[:, None, None] * s + rng.uniform(0, 2 * np.pi, len(k))[:, None, None]),
                    0)
    half_width = np.where(np.abs(s) <= 1, width / 2 * np.clip(taper + ragged, 0, None), -1.0)
    cover = _coverage(np.abs(b) - half_width)
    wave = rng.uniform(0, 2 * np.pi)
    # A few streaks across the width only: finer ones alias into a pattern across the grain.
    grain = 1 + 0.12 * np.sin(2 * np.pi * (b + 0.1 * width * np.sin(3 * s + wave)) / (0.45 * width))
    tint = np.array(_WOOD, np.float32) * (1 + rng.normal(0, 0.08)) + rng.normal(0, 0.02, 3)
    n = np.clip(b / (width / 2), -1, 1)
    shade = grain * (0.8 + 0.25 * np.sqrt(1 - n ** 2) - 0.1 * n)   # rounded across, lit from one side
    return cover, shade[..., None] * tint.astype(np.float32)
