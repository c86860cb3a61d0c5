"""One sample from one file: an image, a waveform or a ``.npy`` array, as float32.

Images are read with Pillow, waveforms with soundfile (libsndfile); both are the well-kept
libraries for the job, so colonnade decodes no format itself. The rules that turn a file
into the spec's input are fixed and documented here, because a model is only as
reproducible as its input pipeline:

* image -> ``[C, H, W]``: converted to ``L`` (C=1), ``RGB`` (C=3) or ``RGBA`` (C=4) by
  Pillow's ``convert``; resized to the spec's ``W x H`` with bilinear filtering when its
  size differs; values divided by 255 (by 65535 for 16-bit greyscale, which fills every
  colour channel of a 3- or 4-channel spec, alpha opaque), so in [0, 1]. Pixels are
  taken as stored: an EXIF orientation tag is not applied (nothing is rotated).
* waveform -> ``[channels, length]`` (or ``[length]`` for a mono spec): samples as
  float32 in [-1, 1] (soundfile's scaling of integer PCM); longer files are cut to their
  first ``length`` frames, shorter ones padded with zeros at the end; the channel count
  must match; a sample rate other than the spec's ``input.rate`` (or, without one, than
  the first waveform's) is refused.
* ``.npy`` -> the array itself, which must have the spec's sample shape exactly.

A file that cannot be used raises ``BadFile`` with the reason, so that the caller can
name the file in one sentence or skip it (``--skip-bad``).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import DataError
from .datasets import checked_float32

__all__ = ["BadFile", "Decoder", "IMAGE_SUFFIXES", "AUDIO_SUFFIXES", "ARRAY_SUFFIXES",
           "SAMPLE_SUFFIXES"]

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp")
AUDIO_SUFFIXES = (".wav", ".flac")
ARRAY_SUFFIXES = (".npy",)
SAMPLE_SUFFIXES = IMAGE_SUFFIXES + AUDIO_SUFFIXES + ARRAY_SUFFIXES
_IMAGE_MODES = {1: "L", 3: "RGB", 4: "RGBA"}


class BadFile(Exception):
    """A sample file that cannot be used; ``str()`` is the reason (no file name)."""


@dataclass
class Decoder:
    """Turns sample files into the spec's input shape; counts what it adapted.

    ``rate`` is the waveforms' sample rate: the spec's ``input.rate`` when given, else
    set by the first waveform read. Counters feed the data notes (how many files were
    resized, cut or padded), so the user sees what the rules did.
    """

    shape: tuple[int, ...]
    rate: int | None = None
    rate_from_spec: bool = False
    resized: int = 0
    cut: int = 0
    padded: int = 0
    converted: list[str] = field(default_factory=list)

    def __call__(self, path: Path) -> np.ndarray:
        suffix = path.suffix.lower()
        if suffix in IMAGE_SUFFIXES:
            return self.image(path)
        if suffix in AUDIO_SUFFIXES:
            return self.waveform(path)
        if suffix in ARRAY_SUFFIXES:
            return self.array(path)
        raise BadFile(f"unknown sample format {suffix or '(none)'}; use "
                      f"{', '.join(SAMPLE_SUFFIXES)}")

    def notes(self) -> list[str]:
        out = list(self.converted)
        if self.resized:
            out.append(f"{self.resized} image(s) resized to {self.shape[2]}x{self.shape[1]} "
                       f"(bilinear)")
        if self.cut:
            out.append(f"{self.cut} waveform(s) cut to their first {self.shape[-1]} frames")
        if self.padded:
            out.append(f"{self.padded} waveform(s) padded with zeros to {self.shape[-1]} "
                       f"frames")
        return out

    # ----------------------------------------------------------------- images
    def image(self, path: Path) -> np.ndarray:
        from PIL import Image, ImageFile, UnidentifiedImageError

        if len(self.shape) != 3 or self.shape[0] not in _IMAGE_MODES:
            raise BadFile(f"it is an image, but the spec's input {list(self.shape)} is not "
                          f"[channels, height, width] with 1, 3 or 4 channels")
        c, h, w = self.shape
        # A truncated file is bad data, even if another library in this process told
        # Pillow to accept truncated images (a process-wide switch), so it is off here.
        lenient, ImageFile.LOAD_TRUNCATED_IMAGES = ImageFile.LOAD_TRUNCATED_IMAGES, False
        try:
            with Image.open(path) as img:
                img.load()
                # 16-bit greyscale is read as "F" whatever the spec's channels: Pillow's
                # conversion of it to RGB or RGBA clips every value above 255 to white.
                sixteen = img.mode in ("I;16", "I;16B", "I;16L", "I")
                img = img.convert("F") if sixteen else img.convert(_IMAGE_MODES[c])
                if img.size != (w, h):
                    img = img.resize((w, h), Image.Resampling.BILINEAR)
                    self.resized += 1
                values = np.asarray(img, dtype=np.float32)
                if sixteen and c > 1:  # grey into every colour channel, opaque, as L does
                    values = np.repeat(values[..., None], c, axis=2)
                    if c == 4:
                        values[..., 3] = 65535.0
        except (UnidentifiedImageError, OSError, ValueError, Image.DecompressionBombError,
                SyntaxError) as exc:
            raise BadFile(f"cannot read it as an image ({_reason(exc)})") from None
        finally:
            ImageFile.LOAD_TRUNCATED_IMAGES = lenient
        scale = np.float32(65535.0 if sixteen else 255.0)
        return (values / scale).reshape(h, w, c).transpose(2, 0, 1)  # (C, H, W)

    # ----------------------------------------------------------------- waveforms
    def waveform(self, path: Path) -> np.ndarray:
        import soundfile

        if len(self.shape) not in (1, 2):
            raise BadFile(f"it is a waveform, but the spec's input {list(self.shape)} is not "
                          f"[channels, length] or [length]")
        channels, length = (1, self.shape[0]) if len(self.shape) == 1 else self.shape
        try:
            frames, rate = soundfile.read(str(path), dtype="float32", always_2d=True)
        except (soundfile.LibsndfileError, RuntimeError, OSError, ValueError) as exc:
            raise BadFile(f"cannot read it as a waveform ({_reason(exc)})") from None
        bad = int(np.count_nonzero(~np.isfinite(frames)))
        if bad:  # a float WAV or FLAC may hold them; named here, with the file
            raise BadFile(f"holds {bad} non-finite sample(s) (NaN or inf); clean the "
                          f"recording")
        if self.rate is None:
            self.rate = int(rate)
        elif rate != self.rate:
            whose = "the spec's input.rate" if self.rate_from_spec else "the first waveform's"
            raise BadFile(f"its sample rate is {rate} Hz, {whose} is {self.rate} Hz; "
                          f"resample it")
        if frames.shape[1] != channels:
            raise BadFile(f"it has {frames.shape[1]} channel(s), the spec's input "
                          f"{channels}")
        wave = frames.T  # (channels, frames)
        if wave.shape[1] > length:
            wave = wave[:, :length]
            self.cut += 1
        elif wave.shape[1] < length:
            wave = np.pad(wave, ((0, 0), (0, length - wave.shape[1])))
            self.padded += 1
        return np.ascontiguousarray(wave.reshape(self.shape))

    # ----------------------------------------------------------------- arrays
    def array(self, path: Path) -> np.ndarray:
        try:
            values = np.load(path, allow_pickle=False)
        except (ValueError, OSError, EOFError) as exc:
            raise BadFile(f"cannot read it as .npy ({_reason(exc)})") from None
        if tuple(values.shape) != self.shape:
            raise BadFile(f"its shape is {list(values.shape)}, but the spec's input is "
                          f"{list(self.shape)}")
        try:
            return checked_float32(values[None], lambda _r: str(path), self.converted)[0]
        except DataError as exc:
            raise BadFile(str(exc).split(": ", 1)[-1]) from None


def _reason(exc: BaseException) -> str:
    """The library's own reason, without the file name it repeats (ours names the file)."""
    text = getattr(exc, "error_string", None) or str(exc)
    text = re.sub(r"\s*'[^']*'", "", text.strip().splitlines()[0] if text.strip() else "")
    return f"{exc.__class__.__name__}: {text.rstrip('.: ')}" if text else exc.__class__.__name__
