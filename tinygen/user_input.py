"""Everything tinygen reads from the user, read within stated limits.

Files (the model, --inputs, --float-model) are checked with stat before they are read: a
folder is refused, a regular file larger than FILE_BYTES_LIMIT is refused unread, and
anything else (a pipe, a device such as /dev/zero) is read up to the limit and refused
past it. A FIFO with no writer reads as empty instead of waiting forever. Flags that size
work (--input-shape, --samples) are checked against their limits before anything is
allocated. Each refusal is one line naming the file or flag (docs/cli.md, "Limits").
"""
from __future__ import annotations

import io
import os
import re
import stat
import zipfile

import numpy as np

from tinygen.errors import TinygenError

FILE_BYTES_LIMIT = 512 * 1024 * 1024  # any file tinygen reads (models are a few MB at most)
DIM_LIMIT = 2**31 - 1  # one dimension of --input-shape
ELEMENTS_LIMIT = 2**31 - 1  # elements of one input (a tensor of 2 GiB or more is refused)
RANK_LIMIT = 8  # dimensions of one --input-shape
SAMPLES_LIMIT = 10_000  # --samples
SAMPLE_BYTES_LIMIT = 1024**3  # float32 input data of all samples together

_DIM = re.compile(r"[0-9]+")


def read_user_file(path: str, what: str = "the model") -> bytes:
    """The bytes of a file the user named, within FILE_BYTES_LIMIT."""
    limit = FILE_BYTES_LIMIT
    try:
        st = os.stat(path)
    except OSError as exc:
        raise TinygenError(f"cannot read {what}: {exc.strerror or exc}", file=path) from None
    if stat.S_ISDIR(st.st_mode):
        raise TinygenError(f"cannot read {what}: it is a folder, not a file", file=path)
    if stat.S_ISREG(st.st_mode) and st.st_size > limit:
        raise TinygenError(f"cannot read {what}: {st.st_size} bytes, more than the "
                           f"{limit} tinygen reads", file=path)
    try:
        # non-blocking open: a FIFO nobody writes to opens (and reads as empty) at once
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
        os.set_blocking(fd, True)
        with os.fdopen(fd, "rb") as fh:
            data = fh.read(limit + 1)
    except OSError as exc:
        raise TinygenError(f"cannot read {what}: {exc.strerror or exc}", file=path) from None
    if len(data) > limit:
        raise TinygenError(f"cannot read {what}: more than the {limit} bytes tinygen reads "
                           "(a device or a stream that does not end?)", file=path)
    return data


def parse_input_shapes(specs: list[str] | None) -> dict[str, tuple[int, ...]]:
    """--input-shape NAME=1x3x96x96 flags as {name: shape}; each input once, each dimension
    a decimal number in 1..DIM_LIMIT, at most RANK_LIMIT of them, at most ELEMENTS_LIMIT
    elements in all."""
    out: dict[str, tuple[int, ...]] = {}
    for spec in specs or []:
        name, sep, dims = spec.rpartition("=")
        parts = dims.lower().split("x")
        if not sep or not name or not all(_DIM.fullmatch(d) for d in parts):
            raise TinygenError(f"--input-shape '{spec}' is not NAME=D1xD2x... with positive "
                               "dims")
        if len(parts) > RANK_LIMIT:
            raise TinygenError(f"--input-shape '{name}': {len(parts)} dimensions, more than "
                               f"{RANK_LIMIT}")
        if any(len(d) > 19 or int(d) > DIM_LIMIT for d in parts):
            raise TinygenError(f"--input-shape '{spec}': a dimension over {DIM_LIMIT}")
        shape = tuple(int(d) for d in parts)
        if min(shape) <= 0:
            raise TinygenError(f"--input-shape '{spec}' is not NAME=D1xD2x... with positive "
                               "dims")
        if int(np.prod(shape, dtype=object)) > ELEMENTS_LIMIT:
            raise TinygenError(f"--input-shape '{spec}': {int(np.prod(shape, dtype=object))} "
                               f"elements, more than {ELEMENTS_LIMIT}")
        if name in out:
            raise TinygenError(f"--input-shape given twice for input '{name}'")
        out[name] = shape
    return out


def sample_count(text: str) -> int:
    """--samples N: 1..SAMPLES_LIMIT (argparse type)."""
    import argparse
    if not re.fullmatch(r"[+-]?[0-9]{1,30}", text.strip()):
        raise argparse.ArgumentTypeError(f"'{text}' is not a number of samples")
    n = int(text)
    if not 1 <= n <= SAMPLES_LIMIT:
        raise argparse.ArgumentTypeError(f"{n} is not in 1..{SAMPLES_LIMIT}")
    return n


def check_sample_volume(graph, count: int, path: str = "") -> None:
    """Refuse, before allocating, sample data of more than SAMPLE_BYTES_LIMIT."""
    per_sample = sum(4 * graph.tensors[io.name].size for io in graph.inputs)
    if per_sample * count > SAMPLE_BYTES_LIMIT:
        raise TinygenError(f"{count} samples of {per_sample} bytes are more than the "
                           f"{SAMPLE_BYTES_LIMIT} bytes of inputs tinygen holds at once; "
                           "give fewer samples", file=path)


def read_npz(path: str, wanted: tuple[str, ...]) -> tuple[dict[str, np.ndarray], list[str]]:
    """The arrays named `wanted` of an .npz file, as plain numbers (no pickled objects),
    within limits; and the names of all the arrays it holds."""
    raw = read_user_file(path, "the inputs")
    if raw.startswith(b"\x93NUMPY"):
        raise TinygenError("a .npy file; --inputs takes an .npz with an array named "
                           "'inputs' (numpy.savez(FILE, inputs=...))", file=path)
    try:
        archive = zipfile.ZipFile(io.BytesIO(raw))
    except (zipfile.BadZipFile, ValueError, OSError):
        raise TinygenError("not an .npz file (numpy.savez(FILE, inputs=...) writes one)",
                           file=path) from None
    arrays: dict[str, np.ndarray] = {}
    names: list[str] = []
    with archive:
        for member in archive.infolist():
            if not member.filename.endswith(".npy"):
                continue
            name = member.filename[:-4]
            names.append(name)
            if name in wanted:
                arrays[name] = _read_member(archive, member, name, path)
    return arrays, names


def _read_member(archive: zipfile.ZipFile, member: zipfile.ZipInfo, name: str, path: str
                 ) -> np.ndarray:
    """One .npy inside the .npz; its header must promise no more data than it holds."""
    fmt = np.lib.format
    try:
        with archive.open(member) as fh:
            blob = fh.read(FILE_BYTES_LIMIT + 1)
        if len(blob) > FILE_BYTES_LIMIT:
            raise TinygenError(f"array '{name}' unpacks to more than {FILE_BYTES_LIMIT} "
                               "bytes", file=path)
        bio = io.BytesIO(blob)
        version = fmt.read_magic(bio)
        header = fmt.read_array_header_1_0 if version == (1, 0) else \
            fmt.read_array_header_2_0
        shape, _, dtype = header(bio)
        if dtype.hasobject:
            raise TinygenError(f"array '{name}' holds Python objects, not numbers", file=path)
        need = int(np.prod(shape, dtype=object)) * dtype.itemsize
        if need > len(blob) - bio.tell():
            raise TinygenError(f"array '{name}' is cut short: its header promises {need} "
                               "bytes", file=path)
        bio.seek(0)
        return fmt.read_array(bio, allow_pickle=False)
    except TinygenError:
        raise
    except (ValueError, OSError, EOFError, zipfile.BadZipFile, RuntimeError,
            NotImplementedError, TypeError) as exc:
        raise TinygenError(f"array '{name}' cannot be read: "
                           f"{' '.join(str(exc).split())[:120]}", file=path) from None
