"""Image files: which files count as images, finding them in folders, and reading one into a tensor.

Every splice data path goes through here: the class folders of an ImageFolder
tree (:mod:`splice.data`), the unlabelled folders of label-free adaptation
(:mod:`splice.adapt.images`) and ``verify --images``.

Finding
    :func:`list_image_files` walks a folder and everything below it, following
    symbolic links to folders, skipping names that start with ``.`` (hidden
    files and folders, macOS ``._*`` companions), and keeps the files whose
    suffix is in :func:`image_suffixes`, sorted. A link to a missing file with
    an image suffix is an error, the same for every command; a link to a folder
    that contains it is an error too (walking it would never end).

Reading
    :func:`read_image` opens one file with Pillow, refuses it from its header
    when it is over the pixel cap (:func:`splice.limits.max_image_pixels`),
    applies its EXIF orientation, takes the first frame of a multi-frame file,
    and returns float32 ``(C, H, W)`` in [0, 1], resized bilinearly to the
    model's ``H x W`` (aspect ratio not kept). Colour images become grey by
    Pillow's ``L`` conversion and grey images RGB by copying the channel;
    transparency is dropped (``convert("RGB")``, as torchvision's default
    loader does). 8-bit images are divided by 255; 16-bit images (modes
    ``I;16*``) and 32-bit integer images (mode ``I``, how many tools store
    16-bit grey) by 65535, and an ``I`` image with values outside 0..65535 is
    refused; 32-bit float images (mode ``F``) are taken as they are and must
    lie in 0..1 (within :data:`FLOAT_SLACK`), else they are refused rather
    than clipped.
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Iterator, Sequence
from pathlib import Path

import torch
from torch import Tensor

from .errors import DataError
from .limits import max_image_pixels

__all__ = [
    "IMAGE_SUFFIXES",
    "OPTIONAL_SUFFIXES",
    "FLOAT_SLACK",
    "image_formats",
    "image_suffixes",
    "list_image_files",
    "check_input_shape",
    "open_capped",
    "read_image",
    "load_images",
    "bad_headers",
    "read_all",
    "refuse_unreadable",
]

# Suffixes every Pillow build reads (.jfif, .jpe: JPEG; .dib: BMP without the file header).
IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".jpe", ".jfif", ".bmp", ".dib", ".gif", ".tif", ".tiff", ".webp",
                  ".ppm", ".pgm", ".pbm")
# Suffixes counted only when the installed Pillow (or a plugin such as pillow-heif) registers a reader for them.
OPTIONAL_SUFFIXES = (".avif", ".heic", ".heif")
# A float image may stray this far outside 0..1 (rounding in the tool that wrote it); it is then clipped. A
# quarter of an 8-bit step, so the clipping cannot be seen in any 8-bit rendering.
FLOAT_SLACK = 1e-3
_SIXTEEN_BIT = 65535


def image_formats() -> tuple[str, ...]:
    """The Pillow formats of :func:`image_suffixes`, the only ones :func:`open_capped` lets Pillow read.

    Pillow picks its reader from a file's first bytes, whatever its name says, and some of its readers run
    another program: EPS hands the file to Ghostscript, a PostScript interpreter. A file named ``.png`` that
    holds PostScript must not reach one, so the readers are limited to the raster formats splice lists.
    """
    from PIL import Image

    registered = Image.registered_extensions()
    return tuple(sorted({registered[s] for s in image_suffixes() if s in registered}))


def image_suffixes() -> tuple[str, ...]:
    """:data:`IMAGE_SUFFIXES` and those of :data:`OPTIONAL_SUFFIXES` the installed Pillow can open, now."""
    from PIL import Image

    registered = Image.registered_extensions()  # loads Pillow's plugins on first use
    return IMAGE_SUFFIXES + tuple(s for s in OPTIONAL_SUFFIXES if registered.get(s) in Image.OPEN)


# ---------------------------------------------------------------------------
# finding
# ---------------------------------------------------------------------------


def list_image_files(folder: str | os.PathLike) -> list[Path]:
    """Every image file in ``folder`` and its subfolders, sorted (see the module docstring for the rules)."""
    folder = Path(os.fspath(folder))
    suffixes = image_suffixes()
    found: list[Path] = []
    broken: list[Path] = []
    pending = [(folder, (os.path.realpath(folder),))]
    while pending:
        where, ancestors = pending.pop()
        for entry in _entries(where):
            if entry.name.startswith("."):
                continue
            path = Path(entry.path)
            if entry.is_dir():  # follows a link to a folder
                real = os.path.realpath(entry.path)
                if real in ancestors:
                    raise DataError(f"{path} leads back to {real}, a folder that contains it (through a symbolic "
                                    "link), so the walk would never end; remove the link.")
                pending.append((path, (*ancestors, real)))
            elif path.suffix.lower() not in suffixes:
                continue
            elif entry.is_file():
                found.append(path)
            elif entry.is_symlink() and not os.path.exists(entry.path):
                broken.append(path)
    if broken:
        shown = "; ".join(f"{p} -> {os.readlink(p)}" for p in sorted(broken)[:5])
        more = f"; and {len(broken) - 5} more" if len(broken) > 5 else ""
        raise DataError(f"{len(broken)} image link(s) under {folder} point to missing files: {shown}{more}. "
                        "Remove the links or restore the files they point to.")
    return sorted(found)


def _entries(folder: Path) -> list[os.DirEntry]:
    try:
        with os.scandir(folder) as it:
            return sorted(it, key=lambda e: e.name)
    except OSError as exc:
        raise DataError(f"cannot list the folder {folder}: {exc.strerror or exc}. Check that it exists and "
                        "that you may read it.") from exc


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------


def check_input_shape(input_shape, min_size: int = 1) -> tuple[int, int, int]:
    """``input_shape`` as ``(C, H, W)`` ints with C = 1 or 3 and H, W >= ``min_size``, else a :class:`DataError`."""
    try:
        shape = tuple(int(v) for v in input_shape)
        exact = all(float(v) == int(v) for v in input_shape)
    except (TypeError, ValueError):
        shape, exact = (), False
    if len(shape) == 3 and exact and shape[0] > 0 and shape[0] not in (1, 3):
        raise DataError(f"image files and the embedded digits feed 1- or 3-channel models; this model takes "
                        f"{shape[0]} (input_shape {input_shape!r}). Build it for 1 or 3 channels (e.g. in_chans=3), "
                        "or feed it from your own loader.")
    if len(shape) != 3 or not exact or shape[0] not in (1, 3) or min(shape[1:]) < min_size:
        raise DataError(
            f"input_shape must be (C, H, W) with C = 1 or 3 and H, W >= {min_size}; got {input_shape!r}. "
            "Use the model's input shape, e.g. (1, 48, 48)."
        )
    return shape


class _PillowLimit:
    """Pillow's own decompression-bomb limit, lifted while splice reads files under a cap the user raised past
    it, and put back afterwards.

    Pillow refuses images over twice ``Image.MAX_IMAGE_PIXELS`` when it opens
    them (and at a few points while decoding), with a message that knows
    nothing of ``--max-image-pixels``. When splice's cap is at least that high
    (the user raised it), Pillow's is set to ``None`` while any thread is
    inside :meth:`entered` and restored when the last one leaves; below it,
    Pillow's limit is left alone (it is process-wide) and its refusal is
    turned into splice's message.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._users = 0
        self._saved: int | None = None

    @contextlib.contextmanager
    def entered(self, cap: int) -> Iterator[int | None]:
        """Lift Pillow's limit for the block if ``cap`` reaches twice it; yields Pillow's own limit (as the
        caller set it, whatever other threads have lifted), decided under the lock."""
        from PIL import Image

        with self._lock:
            limit = self._saved if self._users else Image.MAX_IMAGE_PIXELS
            lift = limit is not None and cap >= 2 * limit
            if lift:
                if self._users == 0:
                    self._saved = Image.MAX_IMAGE_PIXELS
                    Image.MAX_IMAGE_PIXELS = None
                self._users += 1
        try:
            yield limit
        finally:
            if lift:
                with self._lock:
                    self._users -= 1
                    if self._users == 0:
                        Image.MAX_IMAGE_PIXELS = self._saved


_PILLOW_LIMIT = _PillowLimit()


def _over_cap(path: Path, cap: int, size: str) -> DataError:
    return DataError(f"image {path} is {size}, over the cap of {cap:,}; shrink it, or raise the cap with "
                     "--max-image-pixels N (SPLICE_MAX_IMAGE_PIXELS).")


@contextlib.contextmanager
def open_capped(path: Path):
    """``Image.open`` (which reads only the header), refusing an image over splice's pixel cap before it is decoded.

    splice's cap is the only one the user meets (see :class:`_PillowLimit`).
    """
    import warnings

    from PIL import Image

    cap = max_image_pixels()
    with _PILLOW_LIMIT.entered(cap) as pillow:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", Image.DecompressionBombWarning)  # splice's cap is the one that counts
                im = Image.open(path, formats=image_formats())
        except Image.DecompressionBombError:  # over twice Pillow's limit, which is above splice's cap here
            raise _over_cap(path, cap, f"over {2 * (pillow or 0):,} pixels") from None
        except Image.UnidentifiedImageError:
            raise DataError(f"cannot read image {path}: it is damaged, or not in a format splice reads "
                            f"({', '.join(image_formats())}). Remove or replace the file.") from None
        try:
            width, height = im.size
            if width * height > cap:
                raise _over_cap(path, cap, f"{width}x{height} ({width * height:,} pixels)")
            yield im
        finally:
            im.close()


def read_image(path: Path, input_shape: Sequence[int]) -> Tensor:
    """One image as float32 ``(C, H, W)`` in [0, 1], resized and channel-converted."""
    import numpy as np
    from PIL import Image, ImageOps

    c, h, w = input_shape
    try:
        with open_capped(path) as im:
            deep_colour = _deep_colour(path, im)  # before the transpose, whose copy has no format or tags
            kind = im.format
            im = ImageOps.exif_transpose(im)
            if im.mode in ("I", "F") or im.mode.startswith("I;16"):
                arr = _deep_grey(im, path, (w, h))
                if c == 3:
                    arr = np.repeat(arr, 3, axis=0)
            elif deep_colour:
                arr = _deep_colour_pixels(path, kind, c, (w, h))
            else:
                if im.mode == "P":
                    im = im.convert("RGBA")  # palette transparency must go through RGBA
                im = im.convert("L" if c == 1 else "RGB").resize((w, h), Image.Resampling.BILINEAR)
                arr = np.asarray(im, dtype=np.float32) / np.float32(255.0)
                arr = arr[None] if c == 1 else arr.transpose(2, 0, 1)
    except FileNotFoundError:
        raise DataError(f"image file not found: {path}. Check the path.") from None
    except (OSError, ValueError, SyntaxError, Image.DecompressionBombError) as exc:
        raise DataError(f"cannot read image {path}: {exc}. Remove or replace the file.") from exc
    return torch.from_numpy(np.ascontiguousarray(arr))


def _deep_grey(im, path: Path, size: tuple[int, int]):
    """A grey image of more than 8 bits (modes ``I;16*``, ``I``, ``F``) as float32 ``(1, H, W)`` in [0, 1]."""
    import numpy as np

    raw = np.asarray(im)
    if im.mode == "F":
        finite = np.isfinite(raw)
        if not finite.all():
            raise DataError(f"image {path} holds {int(raw.size - np.count_nonzero(finite))} NaN or infinite pixel "
                            "value(s); a single one turns the training loss into NaN. Fix or remove the file.")
        lo, hi = (float(raw.min()), float(raw.max())) if raw.size else (0.0, 0.0)
        if lo < -FLOAT_SLACK or hi > 1.0 + FLOAT_SLACK:
            raise DataError(f"image {path} is a 32-bit float image with values {lo:g}..{hi:g}, outside 0..1, "
                            "and splice would have to clip them; rescale it to 0..1, or save it as an 8- or "
                            "16-bit image.")
        grey = raw.astype(np.float32)
    else:
        lo, hi = (int(raw.min()), int(raw.max())) if raw.size else (0, 0)
        if lo < 0 or hi > _SIXTEEN_BIT:
            kind = "16-bit" if im.mode.startswith("I;16") else "32-bit integer"
            raise DataError(f"image {path} is a {kind} image with values {lo}..{hi}, outside the 0..65535 "
                            "that splice reads as 16-bit; rescale it to 0..65535 (or to 0..1 as a float image), "
                            "or save it as an 8- or 16-bit image.")
        grey = raw.astype(np.float32) / np.float32(_SIXTEEN_BIT)
    return _resized_planes(grey[None], size)


def _resized_planes(planes, size: tuple[int, int]):
    """Float32 planes ``(c, H, W)`` in [0, 1], each resized bilinearly by Pillow (mode F) to ``size`` and clipped."""
    import numpy as np
    from PIL import Image

    resized = [np.asarray(Image.fromarray(np.ascontiguousarray(p)).resize(size, Image.Resampling.BILINEAR),
                          dtype=np.float32) for p in planes]
    return np.clip(np.stack(resized), 0.0, 1.0)


def _deep_colour(path: Path, im) -> bool:
    """A colour image of more than 8 bits per sample, which Pillow reads at 8 (a 16-bit RGB(A) PNG or TIFF): the PNG
    IHDR bit depth byte (PNG specification, ISO/IEC 15948), the TIFF BitsPerSample tag (258)."""
    if im.mode not in ("RGB", "RGBA", "LA"):
        return False
    if im.format == "PNG":
        with open(path, "rb") as fh:
            head = fh.read(26)
        return len(head) == 26 and head[12:16] == b"IHDR" and head[24] > 8
    bits = im.tag_v2.get(258, ()) if im.format == "TIFF" else ()
    return any(int(b) > 8 for b in (bits if isinstance(bits, tuple) else (bits,)))


def _deep_colour_pixels(path: Path, kind: str, c: int, size: tuple[int, int]):
    """A 16-bit colour PNG at full depth (torchvision's PNG decoder; alpha dropped, as Pillow's RGB conversion
    does) as float32 ``(c, H, W)`` in [0, 1]; any other deep colour file is refused."""
    import numpy as np
    from torchvision.io import ImageReadMode, decode_png, read_file

    raw = None
    if kind == "PNG":
        raw = decode_png(read_file(str(path)), mode=ImageReadMode.UNCHANGED, apply_exif_orientation=True).numpy()
    if raw is None or raw.dtype == np.uint8:  # a TIFF (Pillow reads it at 8 bits), or a decoder that truncated
        raise DataError(f"image {path} has more than 8 bits per colour sample, which splice cannot read at full "
                        "depth in this format; convert it to 16-bit grey (PNG or TIFF) or to 8-bit colour.")
    deep = raw.astype(np.float32) / np.float32(_SIXTEEN_BIT)
    deep = deep[:3] if deep.shape[0] >= 3 else deep[:1]  # without alpha
    if c == 1 and deep.shape[0] == 3:  # Pillow's convert("L") weights (ITU-R 601-2 luma)
        deep = (deep[0] * 0.299 + deep[1] * 0.587 + deep[2] * 0.114)[None]
    elif c == 3 and deep.shape[0] == 1:
        deep = np.repeat(deep, 3, axis=0)
    return _resized_planes(deep, size)


def load_images(paths: Sequence[str | os.PathLike], input_shape: Sequence[int]) -> Tensor:
    """Read image files into one float32 batch ``(N, C, H, W)`` in [0, 1] (for ``verify --images``)."""
    shape = check_input_shape(input_shape)
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    paths = [Path(os.fspath(p)) for p in paths]
    if not paths:
        raise DataError("no image files given; pass at least one path.")
    for p in paths:
        if p.is_dir():
            raise DataError(f"{p} is a folder, not an image file; pass image files (or open_data for folders).")
    return torch.stack([read_image(p, shape) for p in paths])


def bad_headers(paths: Sequence[Path]) -> list[str]:
    """``"path (why)"`` for every image of ``paths`` whose header, not its pixels, cannot be read (tens of
    microseconds a file): missing, not an image, or over the pixel cap in force. A file whose pixels are cut short
    still fails only when it is decoded."""
    bad = []
    for path in paths:
        try:
            with open_capped(path):
                pass
        except DataError as exc:
            bad.append(f"{path} ({exc})")
        except (OSError, ValueError, SyntaxError) as exc:  # Pillow's refusals of a file that is no image
            bad.append(f"{path} ({type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''})")
    return bad


def read_all(paths: Sequence[Path], input_shape: Sequence[int], where: str) -> Tensor:
    """Every image of ``paths`` decoded into one ``(N, C, H, W)`` batch; one :class:`DataError` names all that
    fail (:func:`refuse_unreadable`)."""
    images, bad = [], []
    for path in paths:
        try:
            images.append(read_image(path, input_shape))
        except DataError as exc:
            bad.append(f"{path} ({exc.__cause__ or exc})")
    refuse_unreadable(bad, len(paths), where)
    return torch.stack(images)


def refuse_unreadable(bad: Sequence[str], total: int, where: str) -> None:
    """One :class:`DataError` naming the unreadable images ``bad`` (``"path (why)"``, the first ten) of ``total``
    images ``where`` (``"in FOLDER"``, ``"of data 'NAME'"``); nothing when ``bad`` is empty."""
    if bad:
        listed = "; ".join(bad[:10]) + (f"; and {len(bad) - 10} more" if len(bad) > 10 else "")
        raise DataError(f"{len(bad)} of {total} images {where} cannot be read: {listed}. Remove or replace them.")
