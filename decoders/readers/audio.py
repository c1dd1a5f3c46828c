"""Sound-card captures: WAV, FLAC, AIFF, OGG and whatever else libsndfile opens (via soundfile).

Samples come out as float64 in the file's full-scale units: PCM of any width maps to -1.0..+1.0
(``full_scale`` 1.0 per channel); float files give their stored values (``full_scale`` nan, as a
float file has no hard limit). Channels are named ``ch0``, ``ch1``, ... in file order.

Files are streamed with ``SoundFile.read(frames)``; each call of ``blocks()`` opens its own handle,
so two passes may even run side by side. A plain 16-bit PCM WAV (the common sound-card capture) is
read straight from its data chunk instead: its bytes are the little-endian codes libsndfile would
give, and reading them costs about a tenth of libsndfile's conversion to floats.
"""

from __future__ import annotations

import math
import os
import struct
import sys
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from ..errors import CaptureError
from ..model import Block, CaptureInfo
from .base import (
    SourceBase,
    check_block_size,
    check_block_start,
    check_channel_count,
    check_file,
    check_sample_rate,
    reject_options,
)

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
#: integer subtypes read as integers and scaled here: (integer type libsndfile fills, scale).
#: libsndfile left-aligns every PCM code in the integer type and its own float conversion divides
#: by the same power of two, so the values are bit for bit the same, in about half the time
#: (libsndfile's conversion loop is slower than numpy's)
INTEGER_READ: dict[str, tuple[str, float]] = {
    "PCM_S8": ("int16", 2.0**-15),
    "PCM_U8": ("int16", 2.0**-15),
    "PCM_16": ("int16", 2.0**-15),
    "PCM_24": ("int32", 2.0**-31),
    "PCM_32": ("int32", 2.0**-31),
}


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


@dataclass(frozen=True)
class WavHeader:
    """What a little-endian RIFF WAVE header says about its samples (the fields that can lie)."""

    #: format tag of the fmt chunk: 1 PCM, 3 IEEE float, 0xFFFE extensible, ...
    format_tag: int
    #: channel count
    channels: int
    #: bits per sample
    bits: int
    #: bytes per frame (all channels of one sample instant)
    block_align: int
    #: size of the data chunk, bytes, as the header gives it
    data_size: int
    #: bytes of the file after the data chunk's header
    available: int
    #: where the samples start: the offset of the data chunk's first byte in the file
    data_offset: int = 0
    #: integer PCM (format tag 1, or WAVE_FORMAT_EXTENSIBLE with the PCM sub-format)
    pcm: bool = False

    @property
    def streaming(self) -> bool:
        """True when the data size is a placeholder (0 or 0xFFFFFFFF, written before the
        length was known); the data then runs to the end of the file."""
        return self.data_size in (0, 0xFFFFFFFF)

    @property
    def frames(self) -> int | None:
        """Frames the data chunk announces (None for a placeholder size)."""
        if self.streaming or self.block_align == 0:
            return None
        return self.data_size // self.block_align


def _wav_header(path: Path) -> WavHeader | None:
    """The header of a little-endian RIFF WAVE file, or None when the file is not one (or its
    chunks cannot be walked up to the data chunk). Reads only the chunk headers."""
    try:
        with open(path, "rb") as f:
            size = os.fstat(f.fileno()).st_size
            head = f.read(12)
            if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
                return None
            fmt: bytes | None = None
            while True:
                ch = f.read(8)
                if len(ch) < 8:
                    return None
                cid, n = ch[:4], struct.unpack("<I", ch[4:])[0]
                if cid == b"fmt ":
                    fmt = f.read(min(n, 64))
                    f.seek(n - len(fmt) + (n & 1), os.SEEK_CUR)
                elif cid == b"data":
                    if fmt is None or len(fmt) < 16:
                        return None
                    tag, channels, _rate, _bps, align, bits = struct.unpack("<HHIIHH", fmt[:16])
                    # WAVE_FORMAT_EXTENSIBLE: the sub-format GUID starts with the format tag
                    sub = struct.unpack("<H", fmt[24:26])[0] if len(fmt) >= 26 else None
                    pcm = tag == 1 or (tag == 0xFFFE and sub == 1)
                    return WavHeader(
                        tag, channels, bits, align, n, size - f.tell(), f.tell(), pcm
                    )
                else:
                    f.seek(n + (n & 1), os.SEEK_CUR)
    except (OSError, struct.error):
        return None


def _check_wav_header(shown: str, h: WavHeader) -> None:
    """Refuse a WAV header whose fields contradict each other or the file's size.

    source: RIFF WAVE (Microsoft/IBM Multimedia Programming Interface and Data Specifications
    1.0, 1991): for PCM (and IEEE float, and WAVE_FORMAT_EXTENSIBLE) block align = channels x
    bytes per sample, and the data chunk holds whole frames.
    """
    check_channel_count(shown, h.channels, "the WAV header")
    if h.format_tag in (1, 3, 0xFFFE) and h.bits > 0:
        want = h.channels * ((h.bits + 7) // 8)
        if h.block_align != want:
            raise CaptureError(
                f"{shown}: the WAV header gives {h.channels} channels of {h.bits} bits "
                f"({want} bytes per frame) but a block align of {h.block_align} bytes; the "
                "header is damaged, so the samples cannot be told apart"
            )
    if h.streaming or h.block_align == 0:
        return
    if h.data_size % h.block_align:
        raise CaptureError(
            f"{shown}: the WAV data chunk holds {h.data_size} bytes, not a whole number of "
            f"{h.block_align}-byte frames ({h.channels} channels of {h.bits} bits); the channel "
            "count or the sample size in the header is wrong"
        )
    if h.data_size > h.available:
        have = h.available // h.block_align
        raise CaptureError(
            f"{shown}: the WAV header announces {h.frames} frames but the file holds "
            f"only {have}; it is truncated (or its header is wrong): copy it again, or re-save "
            f"it with an audio editor to keep the {have} frames there are"
        )


def _reason(exc: BaseException) -> str:
    """libsndfile's own words, without the file name it repeats."""
    text = str(exc)
    if ": " in text and text.startswith("Error"):
        text = text.split(": ", 1)[1]
    text = text.strip().rstrip(".")
    if "does not exist or is not a regular file" in text:
        text = "format not recognised"
    return text[:1].lower() + text[1:] if text else type(exc).__name__


def _plain_pcm16(wav: WavHeader, info: CaptureInfo) -> bool:
    """True when the WAV header describes what libsndfile reads as PCM_16 frames of
    ``info.n_channels`` little-endian 16-bit codes, nothing else in between."""
    return (
        info.subtype == "PCM_16"
        and wav.pcm
        and wav.bits == 16
        and wav.channels == info.n_channels
        and wav.block_align == 2 * wav.channels
        and wav.data_offset > 0
    )


def _split_pairs(raw: np.ndarray) -> np.ndarray:
    """Two channels of 16-bit codes, interleaved (frames, 2), as two contiguous rows: each
    frame read as one 32-bit number whose halves are the two codes (the low half the first
    channel on a little-endian machine), cut apart by a truncating copy and a shift -- faster
    than numpy's transposing copy of 2-byte items.

    >>> _split_pairs(np.array([[1, -2], [-3, 4]], np.int16)).tolist()
    [[1, -3], [-2, 4]]
    """
    pairs = raw.view(np.uint32).reshape(-1)
    low, high = (0, 1) if sys.byteorder == "little" else (1, 0)
    out = np.empty((2, len(pairs)), dtype=np.int16)
    np.copyto(out[low].view(np.uint16), pairs, casting="unsafe")
    np.copyto(out[high].view(np.uint16), pairs >> 16, casting="unsafe")
    return out


class AudioSource(SourceBase):
    """An open sound file (see :func:`toothcomb.decoders.readers.open_capture`)."""

    def __init__(
        self, path: Path, info: CaptureInfo, read_frames: int, wav: WavHeader | None = None
    ) -> None:
        super().__init__(info)
        self._path = path
        self._frames = read_frames
        self._handles: set[Any] = set()
        #: a plain 16-bit PCM WAV: its samples are read as the bytes they are stored as
        #: (:meth:`_raw_pieces`), which is what libsndfile gives, without its per-call cost
        self._raw = wav if (wav is not None and _plain_pcm16(wav, info)) else None

    def _pieces(
        self, block_size: int, codes: bool = False, start: int = 0
    ) -> Iterator[np.ndarray]:
        if self._raw is not None:
            yield from self._raw_pieces(self._raw, block_size, codes, start)
            return
        try:
            handle = sf.SoundFile(self._path)
        except (sf.SoundFileError, RuntimeError, OSError) as exc:
            raise CaptureError(f"{self.info.path}: cannot be reopened ({_reason(exc)})") from None
        self._handles.add(handle)
        try:
            if start:
                handle.seek(start)
            left = self._frames - start
            pos = start
            while left > 0:
                n = min(block_size, left)
                try:
                    data = self._read(handle, n, codes)
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

    def _raw_pieces(
        self, wav: WavHeader, block_size: int, codes: bool, start: int = 0
    ) -> Iterator[np.ndarray]:
        """The samples of a plain 16-bit PCM WAV from frame ``start`` on, read straight from its
        data chunk: the little-endian codes libsndfile reads as int16 (and scales as
        :meth:`_read` does)."""
        try:
            handle = open(self._path, "rb")  # closed below, or by close()
        except OSError as exc:
            raise CaptureError(
                f"{self.info.path}: cannot be reopened ({exc.strerror or exc})"
            ) from None
        self._handles.add(handle)
        channels = self.info.n_channels
        try:
            handle.seek(wav.data_offset + start * wav.block_align)
            left = self._frames - start
            pos = start
            while left > 0:
                n = min(block_size, left)
                raw = np.empty((n, channels), dtype="<i2")
                try:
                    got = handle.readinto(memoryview(raw).cast("B")) or 0
                except OSError as exc:
                    raise CaptureError(
                        f"{self.info.path}: audio data cannot be read between frames {pos} and "
                        f"{pos + n} of {self._frames} ({exc.strerror or exc}); the file looks "
                        "truncated or corrupt"
                    ) from None
                whole = got // wav.block_align
                if whole == 0:
                    raise CaptureError(
                        f"{self.info.path}: audio data ends at frame {pos} although the file "
                        f"announces {self._frames}; the file looks truncated"
                    )
                raw = raw[:whole].astype(np.int16, copy=False)
                pos += whole
                left -= whole
                yield self._arrange(raw, codes)
        finally:
            handle.close()
            self._handles.discard(handle)

    def _arrange(self, raw: np.ndarray, codes: bool) -> np.ndarray:
        """Integer samples (frames, channels) as :meth:`_read` gives them: the codes, each
        channel contiguous, or float64 values."""
        if codes:
            if raw.shape[1] == 2 and raw.dtype == np.int16 and raw.flags.c_contiguous:
                return _split_pairs(raw).T
            return np.ascontiguousarray(raw.T).T
        out = np.empty((raw.shape[1], raw.shape[0]))
        np.multiply(raw.T, INTEGER_READ[self.info.subtype][1], out=out)
        return out.T

    def _read(self, handle: sf.SoundFile, n: int, codes: bool = False) -> np.ndarray:
        """Up to ``n`` frames as float64 (frames, channels), or as the integer codes when
        ``codes``; each channel contiguous in memory."""
        how = INTEGER_READ.get(self.info.subtype)
        if how is not None:
            return self._arrange(handle.read(n, dtype=how[0], always_2d=True), codes)
        if self.info.subtype == "FLOAT":
            # as stored, then widened by numpy: the same doubles as libsndfile's own float64
            # read, in half the time (0.19 s against 0.39 s for ten minutes of two channels)
            raw = handle.read(n, dtype="float32", always_2d=True)
            out = np.empty((raw.shape[1], raw.shape[0]))
            out[...] = raw.T
            return out.T
        return handle.read(n, dtype="float64", always_2d=True)

    @property
    def code_scale(self) -> float | None:
        """The value of one integer code (a power of two) when the file holds integer PCM,
        else None (then :meth:`code_blocks` gives nothing)."""
        how = INTEGER_READ.get(self.info.subtype)
        return how[1] if how is not None else None

    def code_blocks(self, block_size: int, start: int = 0) -> Iterator[Block]:
        """The samples as the integers the file stores (value = code x :attr:`code_scale`),
        in blocks as :meth:`blocks` gives them, each channel contiguous: a decode finds edges
        on them without first making a float of every sample.

        ``start``, a multiple of ``block_size`` (or the end), skips the blocks before it (their
        samples are not read): the blocks from there on are those a pass from the first sample
        gives."""
        check_block_size(block_size)
        self._check_open()
        if self.code_scale is None:
            return
        yield from self._blocks_from(block_size, start, codes=True)

    def blocks_from(self, block_size: int, start: int = 0) -> Iterator[Block]:
        """The samples as :meth:`blocks` gives them (float64), from ``start`` on (a multiple of
        ``block_size``, or the end; the samples before it are not read): what a worker process
        reads of a file whose samples are not integers (:meth:`code_blocks` gives those)."""
        yield from self._blocks_from(block_size, start, codes=False)

    def _blocks_from(self, block_size: int, start: int, codes: bool) -> Iterator[Block]:
        size = check_block_size(block_size)
        self._check_open()
        check_block_start(start, size, self.info.n_samples)
        got = start
        for piece in self._pieces(size, codes=codes, start=start):
            yield Block(got, piece)
            got += piece.shape[0]
        if got != self.info.n_samples:
            raise CaptureError(
                f"{self.info.path}: read {got} samples but the file announced "
                f"{self.info.n_samples}; it may have changed since it was opened"
            )

    def read_windows(self, starts: Iterable[int], length: int) -> Iterator[np.ndarray]:
        """``length`` frames from each of ``starts`` (fewer at the end of the file), as float64
        (frames, channels): samples from anywhere in the file without reading all of it."""
        wav = self._raw
        if wav is not None:
            # every window's codes into one array, made floats in one pass, given back as views
            starts = [int(s) for s in starts]
            sizes = [max(0, min(int(length), self._frames - s)) for s in starts]
            raw = np.empty((sum(sizes), self.info.n_channels), dtype="<i2")
            got = []
            at = 0
            with open(self._path, "rb") as f:
                for s, n in zip(starts, sizes, strict=True):
                    f.seek(wav.data_offset + s * wav.block_align)
                    part = raw[at : at + n]
                    got.append((f.readinto(memoryview(part).cast("B")) or 0) if n else 0)
                    at += n
            values = self._arrange(raw.astype(np.int16, copy=False), False)
            at = 0
            for n, g in zip(sizes, got, strict=True):
                yield values[at : at + g // wav.block_align]
                at += n
            return
        with sf.SoundFile(self._path) as handle:
            for s in starts:
                handle.seek(int(s))
                yield self._read(handle, int(length))

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
    handles = "sound-card recordings, anything libsndfile reads"
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
        try:
            with open(p, "rb") as fh:
                head = fh.read(16)
        except OSError as exc:
            raise CaptureError(f"{shown}: cannot be read ({exc.strerror or exc})") from None
        if _sniff(head, p.suffix.lower()) is None:
            raise CaptureError(
                f"{shown}: does not start like a sound file (no WAV, FLAC, AIFF, OGG, AU, CAF "
                "or MP3 header); it is corrupt or not audio"
            )
        wav = _wav_header(p)
        if wav is not None:
            # before libsndfile: it takes a lying header at its word
            _check_wav_header(shown, wav)
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
        check_channel_count(shown, channels, "the audio header")
        if frames <= 0:
            raise CaptureError(f"{shown}: the audio file holds no samples (0 frames)")
        notes: list[str] = []
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
        return AudioSource(p, info, frames, wav)
