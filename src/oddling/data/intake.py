"""Find input files and decode them safely to RGB: every file gets a status, and no file crashes the run."""
from __future__ import annotations

import errno
import hashlib
import os
import re
import stat
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

IMAGE_SUFFIXES = frozenset({".jpg", ".jpeg", ".png", ".bmp", ".tif", ".tiff", ".webp", ".gif"})
MAX_PIXELS_DEFAULT = 89_478_485     # decompression-bomb guard: Pillow's own default limit (~9.5k x 9.5k)
MAX_ASPECT_RATIO = 50               # longer side / shorter side; beyond it the resize to min_side explodes
ORIGINAL_SIZE = "oddling_original_size"   # key in image.info: (width, height) of the file itself
FRAMES = "oddling_frames"          # key in image.info: frames (pages) in the file, None if uncountable
BANK_MARKER = "bank.json"          # a folder holding this file is an oddling bank, never input

# Only the decoders for the suffixes above: a file named .png that holds EPS or another rarely
# used format is refused, not handed to Ghostscript or an obscure decoder. (Pillow's JPEG opener
# also returns MPO, the multi-picture JPEG many cameras write as .jpg; draft mode works on both.)
_FORMATS = ("JPEG", "PNG", "BMP", "TIFF", "WEBP", "GIF")
_DRAFT_FORMATS = frozenset({"JPEG", "MPO"})
_MESSAGE_CHARS = 120


# --- paths as text ---------------------------------------------------------------------------------
# Inside oddling a path is a str as Python gives it: bytes that are not valid UTF-8 arrive as lone
# surrogates U+DC80..U+DCFF (PEP 383 "surrogateescape"), so the str still opens the real file. No
# writer can encode those, so every path written as text (CSV, JSON, the page) goes through
# display_path: each undecodable byte becomes \xNN (two lower-case hex digits), a literal
# backslash is doubled, and any other lone surrogate (possible on Windows) becomes \uDXXX.
# Everything else, valid non-ASCII included, is left as it is. path_from_display undoes it.
_DISPLAY_SPECIAL = re.compile("[\\\\\ud800-\udfff]")   # a backslash or any lone surrogate
_DISPLAY_ESCAPE = re.compile(r"\\(\\|x[89a-f][0-9a-f]|ud[89a-f][0-9a-f]{2})", re.IGNORECASE)


def _display_char(match: re.Match) -> str:
    code = ord(match.group())
    if code == 0x5C:
        return "\\\\"
    if 0xDC80 <= code <= 0xDCFF:
        return f"\\x{code - 0xDC00:02x}"
    return f"\\u{code:04x}"


def _real_char(match: re.Match) -> str:
    escape = match.group(1)
    if escape == "\\":
        return "\\"
    if escape[0] in "xX":
        return chr(0xDC00 + int(escape[1:], 16))
    return chr(int(escape[1:], 16))


def display_path(path: str) -> str:
    """`path` as text any writer can encode (valid UTF-8), reversibly: see path_from_display.

    Undecodable bytes (surrogateescape) become \\xNN, a backslash becomes two backslashes:
    os.fsdecode(b"x\\xff.png") -> "x\\\\xff.png" (shown as x\\xff.png), "a\\b" -> "a\\\\b".
    """
    return _DISPLAY_SPECIAL.sub(_display_char, path)


def path_from_display(text: str) -> str:
    """The inverse of display_path: the str that opens the real file (surrogateescape).

    A backslash not followed by a backslash, xNN (NN from 80 to ff) or uDXXX is kept as it is.
    """
    return _DISPLAY_ESCAPE.sub(_real_char, text)


class IntakeError(Exception):
    """A file (or folder) that cannot be used; `status` is the short reason written into the results."""

    def __init__(self, status: str):
        super().__init__(status)
        self.status = status


@dataclass
class Discovered:
    """What `walk` found: `paths` (each gets a row) and `left_out`, the documented exclusions counted
    by kind ("hidden", "excluded folder", "bank folder"; a folder counts once, not its contents)."""

    paths: list[Path]
    left_out: dict[str, int]


def walk(root: Path, exclude: Iterable[Path] = ()) -> Discovered:
    """Every entry under `root` that is not hidden, excluded or a bank folder, sorted by POSIX
    relative path; check_file gives the status of those that are not (links to) regular files.

    Regular files and links to them, broken links, FIFOs, sockets and devices are all listed
    (nothing is opened here, so a FIFO cannot block). Symbolic links to folders are followed,
    after the real folders, and each real folder is searched once: a link to a folder already
    searched (a loop back to a parent, a second link) is listed itself instead of its contents.
    A folder that cannot be listed is listed itself too. Left out, and counted in `left_out`:
    hidden files and folders, folders in `exclude` (by resolved path) and bank folders (holding
    bank.json); `root` itself is always searched.
    """
    root = Path(root)
    if not root.is_dir():
        raise IntakeError(f"{root} is not a folder")
    excluded = {Path(p).resolve() for p in exclude}
    found: list[Path] = []
    left_out: dict[str, int] = {}
    searched: set[str] = {os.path.realpath(root)}
    links: list[Path] = []     # symbolic links to folders: followed once the real folders are done

    def leave_out(kind: str) -> None:
        left_out[kind] = left_out.get(kind, 0) + 1

    def unlistable(error: OSError) -> None:
        if error.filename is None or Path(error.filename) == root:
            raise IntakeError(f"{root} cannot be listed: {error.strerror or error}")
        found.append(Path(error.filename))   # check_file says why

    def search(top: Path) -> None:
        for dirpath, dirnames, filenames in os.walk(top, onerror=unlistable, followlinks=False):
            here = Path(dirpath)
            keep = []
            for name in dirnames:   # os.walk lists links to folders here, not among the files
                folder = here / name
                if name.startswith("."):
                    leave_out("hidden")
                elif folder.resolve() in excluded:
                    leave_out("excluded folder")
                elif (folder / BANK_MARKER).is_file():
                    leave_out("bank folder")
                elif folder.is_symlink():
                    links.append(folder)
                elif os.path.realpath(folder) in searched:   # a real folder met again below a link
                    found.append(folder)
                else:
                    searched.add(os.path.realpath(folder))
                    keep.append(name)
            dirnames[:] = keep
            for name in filenames:
                if name.startswith("."):
                    leave_out("hidden")
                else:
                    found.append(here / name)

    search(root)
    while links:
        links.sort(key=lambda p: p.relative_to(root).as_posix())
        link = links.pop(0)
        real = os.path.realpath(link)
        if real in searched:
            found.append(link)   # a loop, or a folder already searched by another way
        else:
            searched.add(real)
            search(link)
    return Discovered(sorted(found, key=lambda p: p.relative_to(root).as_posix()), left_out)


def discover(root: Path, exclude: Iterable[Path] = ()) -> list[Path]:
    """walk(root, exclude).paths: every entry that gets a row, sorted by POSIX relative path."""
    return walk(root, exclude).paths


_FILE_KINDS = ((stat.S_ISFIFO, "FIFO"), (stat.S_ISSOCK, "socket"), (stat.S_ISCHR, "character device"),
               (stat.S_ISBLK, "block device"))
FOLDER_AGAIN = "skipped: folder already searched (reached again through a symbolic link)"


def check_file(path: Path) -> int:
    """The size of `path` if it is a regular file or a link to one; else IntakeError with the status.

    Only stat()s, never opens: opening a FIFO waits for a writer forever.
    """
    try:
        info = os.stat(path)
    except OSError as exc:
        if os.path.islink(path):
            if exc.errno == errno.ELOOP:
                raise IntakeError("skipped: symbolic link loop") from exc
            if exc.errno == errno.ENOENT:
                raise IntakeError("skipped: broken symbolic link") from exc
        raise IntakeError(f"unreadable: {exc.strerror or _short(exc)}") from exc
    if stat.S_ISREG(info.st_mode):
        return info.st_size
    if stat.S_ISDIR(info.st_mode):
        try:
            with os.scandir(path):
                pass
        except OSError as exc:
            raise IntakeError(f"unreadable: folder cannot be listed ({exc.strerror or _short(exc)})") from exc
        raise IntakeError(FOLDER_AGAIN)
    kind = next((name for test, name in _FILE_KINDS if test(info.st_mode)), "unknown kind")
    raise IntakeError(f"skipped: not a regular file ({kind})")


def sha256_file(path: Path) -> str:
    """Hex SHA-256 of the file's bytes, read in 1 MiB chunks so memory stays flat.

    Opened without waiting (O_NONBLOCK), so a FIFO put in the file's place raises OSError
    instead of blocking.
    """
    digest = hashlib.sha256()
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    with open(fd, "rb") as f:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise OSError(errno.EINVAL, "not a regular file", str(path))
        for chunk in iter(lambda: f.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _short(exc: BaseException, path: Path | None = None) -> str:
    """The first line of an exception's message, without the full path, capped in length."""
    text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    if path is not None:
        text = text.replace(f"{str(path)!r}", "").replace(str(path), path.name).strip()
    text = text.split(", could be decompression bomb")[0]
    return text if len(text) <= _MESSAGE_CHARS else text[:_MESSAGE_CHARS - 3] + "..."


def _stretch_to_uint8(values: np.ndarray) -> np.ndarray:
    """Min-max stretch of the finite values onto 0..255; NaN -> 0, +inf -> 255, -inf -> 0."""
    values = values.astype(np.float64)
    finite = np.isfinite(values)
    if not finite.any():
        return np.zeros(values.shape, np.uint8)
    low, high = float(values[finite].min()), float(values[finite].max())
    if high <= low:   # a constant image carries no contrast to stretch
        return np.zeros(values.shape, np.uint8)
    clean = np.nan_to_num(values, nan=low, posinf=high, neginf=low)
    grey = np.round((clean - low) * (255.0 / (high - low))).astype(np.uint8)
    grey[np.isnan(values)] = 0
    return grey


def _grey_to_rgb(grey: np.ndarray) -> Image.Image:
    return Image.fromarray(grey).convert("RGB")


def _over_white(image: Image.Image) -> Image.Image:
    """Composite transparency over white: a cut-out object on a page, as a viewer shows it."""
    rgba = image.convert("RGBA")
    background = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
    return Image.alpha_composite(background, rgba).convert("RGB")


def to_rgb(image: Image.Image) -> Image.Image:
    """Any Pillow mode to 8-bit RGB; a new image unless `image` is already RGB."""
    mode = image.mode
    if mode in ("RGBA", "RGBa", "LA", "La", "PA") or (
            mode in ("P", "L", "RGB") and "transparency" in image.info):
        # A transparent colour (PNG tRNS) goes through RGBA too, so transparent pixels become white.
        return _over_white(image)
    if mode == "RGB":
        return image
    if mode.startswith("I;16"):
        # 16-bit data is taken to use the full range: 0..65535 maps linearly onto 0..255.
        values = np.asarray(image, dtype=np.float64)
        return _grey_to_rgb(np.round(values / 257.0).astype(np.uint8))
    if mode == "I":
        # 32-bit ints usually hold 8- or 16-bit samples (TIFF, PNG read as I); keep those scales.
        # Anything else (negative, or beyond 16 bits) has no known range and is stretched.
        values = np.asarray(image, dtype=np.float64)
        low, high = (float(values.min()), float(values.max())) if values.size else (0.0, 0.0)
        if low >= 0 and high <= 255:
            return _grey_to_rgb(values.astype(np.uint8))
        if low >= 0 and high <= 65535:
            return _grey_to_rgb(np.round(values / 257.0).astype(np.uint8))
        return _grey_to_rgb(_stretch_to_uint8(values))
    if mode == "F":
        # Floats in [0, 1] are a normalised image; any other range is stretched. NaN -> 0.
        values = np.asarray(image, dtype=np.float64)
        finite = values[np.isfinite(values)]
        if finite.size and finite.min() >= 0.0 and finite.max() <= 1.0 and not np.isinf(values).any():
            return _grey_to_rgb(np.round(np.nan_to_num(values, nan=0.0) * 255.0).astype(np.uint8))
        return _grey_to_rgb(_stretch_to_uint8(values))
    # "1", "L", "P", "CMYK", "YCbCr", "HSV": Pillow's own conversion is the right one
    # (CMYK uses Pillow's naive inversion; an ICC-managed conversion would need the profile).
    return image.convert("RGB")


def _check_shape(width: int, height: int, min_side: int | None, max_pixels: int) -> None:
    """Refuse, from the header, what the resize to `min_side` would blow up: a 375-byte PNG of
    100000 x 1 pixels passes the pixel-count guard but is 25 600 000 x 256 once resized."""
    long_side, short_side = max(width, height), min(width, height)
    if long_side > MAX_ASPECT_RATIO * short_side:
        raise IntakeError(f"skipped: extreme aspect ratio {width}x{height} (limit {MAX_ASPECT_RATIO}:1)")
    if min_side:
        # The shorter side becomes min_side, the longer one scales with it (as preprocess does).
        resized_long = max(1, int(long_side * (min_side / short_side)))
        new_w, new_h = (resized_long, min_side) if width >= height else (min_side, resized_long)
        if new_w * new_h > max_pixels:
            raise IntakeError(f"skipped: image too large once resized ({width}x{height} to {new_w}x{new_h} "
                              f"pixels, limit {max_pixels})")


def _check_header(opened: Image.Image, min_side: int | None, max_pixels: int) -> int | None:
    """The checks made from the header, before any pixel memory is allocated; the frame count."""
    width, height = opened.size
    if width * height > max_pixels:
        raise IntakeError(f"unreadable: image too large ({width} x {height} pixels, limit {max_pixels})")
    _check_shape(width, height, min_side, max_pixels)
    if opened.format == "MPO":
        return 1   # a camera JPEG with a preview picture after the photo: the photo is the image
    try:
        frames = int(getattr(opened, "n_frames", 1))   # GIF, WebP, APNG, TIFF: may read on through the file
    except Exception:   # a broken later frame must not cost the first one: it is still scored
        frames = None
    if frames != 1:
        opened.seek(0)
    return frames


def frames_note(frames: int | None) -> str:
    """What the status of an ok file adds when only its first frame (page) was scored: "" for one."""
    if frames == 1:
        return ""
    return f"first of {frames} frames" if frames else "first frame only (the others could not be counted)"


def _decode(path: Path, min_side: int | None, max_pixels: int) -> Image.Image:
    with Image.open(path, formats=_FORMATS) as opened:
        frames = _check_header(opened, min_side, max_pixels)
        width, height = opened.size
        if min_side and opened.format in _DRAFT_FORMATS:
            # Decode at the smallest DCT scale (1/2, 1/4, 1/8) keeping both sides >= min_side.
            # A square request holds whichever way the EXIF orientation later turns the image.
            opened.draft("RGB", (min_side, min_side))
        opened.load()   # at frame 0: only the first frame (page) of an animation or a TIFF is decoded
        decoded_size = opened.size
        try:
            image = ImageOps.exif_transpose(opened)   # always a new image, independent of the file
        except Exception:   # broken EXIF should not cost a decodable image: keep it unrotated
            image = opened.copy()
    # The file's own size, as the viewer shows it (turned by EXIF), whatever draft mode decoded.
    turned = image.size != decoded_size
    original_size = (height, width) if turned else (width, height)
    try:
        rgb = to_rgb(image)
    except ValueError as exc:   # e.g. a TIFF in LAB, which Pillow cannot convert to RGB
        raise IntakeError(f"unreadable: cannot convert mode {image.mode} to RGB ({_short(exc)})") from exc
    rgb.info[ORIGINAL_SIZE] = original_size
    rgb.info[FRAMES] = frames
    return rgb


def _header(path: Path, min_side: int | None, max_pixels: int) -> int | None:
    with Image.open(path, formats=_FORMATS) as opened:
        return _check_header(opened, min_side, max_pixels)


def check_type(path: Path) -> None:
    """The checks made before a file is opened, IntakeError with the status when one fails: a
    regular file (check_file), with an image suffix, not empty.

    load_rgb makes them first; so does the embedding runner before it looks in the cache, so a
    file gets the same status whatever the cache holds.
    """
    path = Path(path)
    size = check_file(path)   # before any open: links, folders, FIFOs and devices get their own status
    suffix = path.suffix.lower()
    if suffix not in IMAGE_SUFFIXES:
        raise IntakeError(f"skipped: not an image file type ({suffix or 'no extension'})")
    if size == 0:
        raise IntakeError("unreadable: empty file (0 bytes)")


def load_rgb(path: Path, min_side: int | None = None, max_pixels: int = MAX_PIXELS_DEFAULT) -> Image.Image:
    """Decode `path` to a fully loaded RGB image, EXIF orientation applied; IntakeError says why not.

    With `min_side`, JPEGs decode at reduced size (Pillow's draft mode) with both sides still
    >= min_side: a 12-MP photo decodes several times faster when the network wants 256 px.
    Truncated files fail (ImageFile.LOAD_TRUNCATED_IMAGES is left alone). The pixel count is
    checked against `max_pixels` from the header, before any pixel is decoded; so are the aspect
    ratio (at most MAX_ASPECT_RATIO:1) and, with `min_side`, the pixel count after the resize.
    Animations and multi-page files give their first frame; image.info[FRAMES] holds the count
    (frames_note turns it into the words for the status).
    """
    path = Path(path)
    check_type(path)
    return _intake(path, _decode, min_side, max_pixels)


def check_header(path: Path, min_side: int | None = None, max_pixels: int = MAX_PIXELS_DEFAULT) -> int | None:
    """Every check load_rgb makes before decoding pixels (the same IntakeError statuses), and the
    file's frame count (None if it cannot be counted): for a file whose vector is cached."""
    path = Path(path)
    check_type(path)
    return _intake(path, _header, min_side, max_pixels)


def _intake(path: Path, read, min_side: int | None, max_pixels: int):
    """read(path, min_side, max_pixels), with whatever Pillow raises turned into IntakeError."""
    try:
        return read(path, min_side, max_pixels)
    except IntakeError:
        raise
    except Image.DecompressionBombError as exc:
        raise IntakeError(f"unreadable: image too large ({_short(exc)})") from exc
    except UnidentifiedImageError as exc:
        raise IntakeError(f"unreadable: not a recognised image ({_short(exc, path)})") from exc
    except OSError as exc:
        if exc.errno is not None:   # the file system refused (permissions...), not the decoder
            raise IntakeError(f"unreadable: {exc.strerror or _short(exc)}") from exc
        raise IntakeError(f"unreadable: truncated or corrupt image data ({_short(exc)})") from exc
    except (SyntaxError, EOFError, ValueError) as exc:   # Pillow's PNG and GIF readers use these
        raise IntakeError(f"unreadable: truncated or corrupt image data ({_short(exc)})") from exc
    except Exception as exc:   # a decoder bug on a hostile file must not stop the run
        raise IntakeError(f"unreadable: decoder failed ({type(exc).__name__}: {_short(exc)})") from exc
