"""Sound-card captures: WAV, FLAC, AIFF, OGG and whatever else libsndfile opens (via soundfile).

Samples come out as float64 in the file's full-scale units: PCM of any width maps to -1.0..+1.0
(``full_scale`` 1.0 per channel); float files give their stored values (``full_scale`` nan, as a
float file has no hard limit). Channels are named ``ch0``, ``ch1``, ... in file order.

Files are streamed with ``SoundFile.read(frames)``; each call of ``blocks()`` opens its own handle,
so two passes may even run side by side.
"""

from __future__ import annotations

import math
import os
import struct
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from ..errors import CaptureError
from ..model import CaptureInfo
from .base import SourceBase, check_file, check_sample_rate, reject_options

#: lower-case suffixes this reader claims (used when the content sniff is not conclusive)
EXTENSIONS: tuple[str, ...] = (
    ".wav",  # RIFF WAVE, also WAVE_FORMAT_EXTENSIBLE
    ".wave",
    ".flac",  # Free Lossless Audio Codec
    ".aif",  # Audio Interchange File Format
    ".aiff",
    ".aifc",
    ".ogg",  # Ogg container (Vorbis, Opus, FLAC)
    ".oga",
    ".opus",
    ".au",  # Sun/NeXT
    ".snd",
    ".caf",  # Core Audio Format
    ".w64",  # Wave64
    ".rf64",  # RIFF 64
    ".mp3",  # MPEG-1/2 layer III (read only, lossy)
)

#: (offset, magic bytes, what it is): content signatures of the containers libsndfile reads
MAGIC: tuple[tuple[int, bytes, str], ...] = (
    (0, b"RIFF", "WAV"),
    (0, b"RIFX", "WAV (big-endian)"),
    (0, b"RF64", "RF64"),
    (0, b"BW64", "RF64"),
    (0, b"riff\x2e\x91\xcf\x11", "W64"),
    (0, b"fLaC", "FLAC"),
    (0, b"OggS", "OGG"),
    (0, b".snd", "AU"),
    (0, b"dns.", "AU (little-endian)"),
    (0, b"caff", "CAF"),
    (0, b"ID3", "MP3"),
)

#: soundfile subtypes that store floats: no fixed full scale
FLOAT_SUBTYPES = frozenset({"FLOAT", "DOUBLE", "VORBIS", "OPUS"})


def _sniff(head: bytes, suffix: str = "") -> str | None:
    """Name of the audio container ``head`` starts like, or None.

    A bare MPEG frame sync (an MP3 without ID3 tag) is too weak a sign on its own (random bytes
    match it often), so it only counts for a ``.mp3`` file."""
    for offset, magic, what in MAGIC:
        if head[offset : offset + len(magic)] == magic:
            return what
    if head[:4] == b"FORM" and head[8:12] in (b"AIFF", b"AIFC"):
        return "AIFF"
    if suffix == ".mp3" and len(head) >= 2 and head[0] == 0xFF and (head[1] & 0xE0) == 0xE0:
        return "MP3"
    return None


def _wav_header_frames(path: Path) -> int | None:
    """Frames a RIFF WAV header announces in its data chunk, or None when it cannot tell (not a
    little-endian RIFF file, streaming sizes, odd layout)."""
    try:
        with open(path, "rb") as f:
            head = f.read(12)
            if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
                return None
            block_align = 0
            while True:
                ch = f.read(8)
                if len(ch) < 8:
                    return None
                cid, size = ch[:4], struct.unpack("<I", ch[4:])[0]
                if cid == b"fmt ":
                    fmt = f.read(size + (size & 1))
                    if len(fmt) < 14:
                        return None
                    block_align = struct.unpack("<H", fmt[12:14])[0]
                elif cid == b"data":
                    if block_align == 0 or size in (0, 0xFFFFFFFF):
                        return None
                    return size // block_align
                else:
                    f.seek(size + (size & 1), os.SEEK_CUR)
    except OSError:
        return None


def _reason(exc: BaseException) -> str:
    """libsndfile's own words, without the file name it repeats."""
    text = str(exc)
    if ": " in text and text.startswith("Error"):
        text = text.split(": ", 1)[1]
    text = text.strip().rstrip(".")
    if "does not exist or is not a regular file" in text:
        text = "format not recognised"
    return text[:1].lower() + text[1:] if text else type(exc).__name__


class AudioSource(SourceBase):
    """An open sound file (see :func:`toothcomb.decoders.readers.open_capture`)."""

    def __init__(self, path: Path, info: CaptureInfo, read_frames: int) -> None:
        super().__init__(info)
        self._path = path
        self._frames = read_frames
        self._handles: set[sf.SoundFile] = set()

    def _pieces(self, block_size: int) -> Iterator[np.ndarray]:
        try:
            handle = sf.SoundFile(self._path)
        except (sf.SoundFileError, RuntimeError, OSError) as exc:
            raise CaptureError(f"{self.info.path}: cannot be reopened ({_reason(exc)})") from None
        self._handles.add(handle)
        try:
            left = self._frames
            pos = 0
            while left > 0:
                n = min(block_size, left)
                try:
                    data = handle.read(n, dtype="float64", always_2d=True)
                except (sf.SoundFileError, RuntimeError, OSError) as exc:
                    raise CaptureError(
                        f"{self.info.path}: audio data is damaged between frames {pos} and "
                        f"{pos + n} of {self._frames} ({_reason(exc)}); the file looks "
                        "truncated or corrupt"
                    ) from None
                if data.shape[0] == 0:
                    raise CaptureError(
                        f"{self.info.path}: audio data ends at frame {pos} although the file "
                        f"announces {self._frames}; the file looks truncated"
                    )
                pos += data.shape[0]
                left -= data.shape[0]
                yield data
        finally:
            handle.close()
            self._handles.discard(handle)

    def _close(self) -> None:
        for handle in list(self._handles):
            handle.close()
        self._handles.clear()


class AudioReader:
    """Reader plugin for sound files (entry point ``audio``).

    >>> import numpy as np, soundfile, tempfile, os
    >>> path = os.path.join(tempfile.mkdtemp(), "tone.wav")
    >>> soundfile.write(path, np.zeros((480, 2)), 48000, subtype="PCM_16")
    >>> with AudioReader.open(path) as src:
    ...     print(src.info.sample_rate, src.info.n_samples, src.info.channels, src.info.subtype)
    48000.0 480 ('ch0', 'ch1') PCM_16
    """

    name = "audio"
    extensions = EXTENSIONS

    @staticmethod
    def detect(path: str | os.PathLike[str]) -> bool:
        """True when the file starts like an audio container libsndfile reads."""
        try:
            with open(path, "rb") as f:
                head = f.read(16)
        except OSError:
            return False
        return _sniff(head, Path(path).suffix.lower()) is not None

    @staticmethod
    def open(
        path: str | os.PathLike[str], *, sample_rate: float | None = None, **options: Any
    ) -> AudioSource:
        """Open a sound file. ``sample_rate`` overrides the rate in the header (with a note)."""
        reject_options("audio", options)
        rate_override = check_sample_rate(sample_rate)
        shown = os.fspath(path)
        p = check_file(path)
        with open(p, "rb") as fh:
            head = fh.read(16)
        if _sniff(head, p.suffix.lower()) is None:
            raise CaptureError(
                f"{shown}: does not start like a sound file (no WAV, FLAC, AIFF, OGG, AU, CAF "
                "or MP3 header); it is corrupt or not audio"
            )
        try:
            with sf.SoundFile(p) as f:
                rate = float(f.samplerate)
                frames = int(f.frames)
                channels = int(f.channels)
                fmt = str(f.format)
                subtype = str(f.subtype)
        except (sf.SoundFileError, RuntimeError, OSError, TypeError, ValueError) as exc:
            raise CaptureError(
                f"{shown}: cannot be read as audio ({_reason(exc)}); the file may be truncated, "
                "corrupt or not a sound file"
            ) from None
        if channels < 1:
            raise CaptureError(f"{shown}: the audio header announces {channels} channels")
        if frames <= 0:
            raise CaptureError(f"{shown}: the audio file holds no samples (0 frames)")
        notes: list[str] = []
        promised = _wav_header_frames(p) if fmt in ("WAV", "WAVEX") else None
        if promised is not None and promised > frames:
            notes.append(
                f"the header announces {promised} frames but only {frames} are in the file "
                "(it looks truncated); reading those"
            )
        if rate_override is not None and rate_override != rate:
            notes.append(f"sample rate {rate_override:g} Hz given overrides the file's {rate:g} Hz")
            rate = rate_override
        full = math.nan if subtype in FLOAT_SUBTYPES else 1.0
        info = CaptureInfo(
            path=shown,
            sample_rate=rate,
            n_samples=frames,
            channels=tuple(f"ch{i}" for i in range(channels)),
            format=fmt.lower(),
            subtype=subtype,
            t0=0.0,
            units=("",) * channels,
            full_scale=(full,) * channels,
            notes=tuple(notes),
        )
        return AudioSource(p, info, frames)
