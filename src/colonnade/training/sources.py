"""Where task data comes from: .npz, .csv, .npy pairs, class folders and index files.

Each reader returns a ``Source``: the samples (an array in memory, or ``Rows`` read on
demand), the raw labels (integers or class names, or none), and notes on what was
converted or skipped. Label meaning (class names, ranges) is settled in ``data``; the
shapes and values of the samples are checked here, with one sentence naming the file.

Data that can be larger than memory is never read whole: a ``.npy`` file is read by
position, row by row (``NpyRows``), and a folder keeps its decoded samples in memory
only while they fit the budget the caller gives, otherwise it decodes each file when
its row is asked for (``FileRows``).
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np

from ..errors import DataError
from .datasets import Rows, checked_float32
from .decoders import BadFile, Decoder
from .table_files import IsIndex, Source, read_csv, read_csv_rows, read_npz

__all__ = ["Source", "NpyRows", "FileRows", "open_source", "source_digest", "INDEX_FILE"]

INDEX_FILE = "index.csv"


# --------------------------------------------------------------------- .npy by position
class NpyRows(Rows):
    """Rows of a ``.npy`` file read by position (``os.preadv``), never mapped whole.

    A whole-file memory map would count against the process's address space and its
    touched pages against its resident memory; positional reads keep both at one batch,
    while the operating system's page cache still makes repeated epochs fast.
    """

    def __init__(self, path: Path) -> None:
        self._fd: int | None = None
        self._pid = -1
        try:
            with open(path, "rb") as f:
                major, _ = np.lib.format.read_magic(f)
                reader = (np.lib.format.read_array_header_1_0 if major == 1
                          else np.lib.format.read_array_header_2_0)
                shape, fortran, dtype = reader(f)
                offset = f.tell()
        except (ValueError, OSError, EOFError) as exc:
            raise DataError(f"{path}: cannot read as .npy ({exc.__class__.__name__}); write "
                            f"it with numpy.save") from None
        if fortran and len(shape) > 1:
            raise DataError(f"{path}: the array is stored in Fortran order; save it with "
                            f"numpy.save(path, numpy.ascontiguousarray(x))")
        if dtype.kind not in "fiub" or dtype.hasobject:
            raise DataError(f"{path}: values must be numbers, got {dtype}; convert them to "
                            f"float32")
        if len(shape) < 1 or shape[0] == 0:
            raise DataError(f"{path}: holds no samples (shape {list(shape)})")
        super().__init__(shape[0], shape[1:], str(path))
        self.path, self.file_dtype, self.offset = path, dtype, offset
        self.row_bytes = int(np.prod(shape[1:], dtype=np.int64)) * dtype.itemsize
        expected = offset + shape[0] * self.row_bytes
        if os.path.getsize(path) < expected:
            raise DataError(f"{path}: the file is shorter than its header says ({shape[0]} "
                            f"rows of {list(shape[1:])}); it is truncated, write it again")
        if dtype != np.float32:
            self.notes.append(f"{path.name}: {dtype} values converted to float32 per batch")

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_fd"], state["_pid"] = None, -1  # a worker process opens its own
        return state

    def _handle(self) -> int:
        if self._fd is None or self._pid != os.getpid():
            self._fd, self._pid = os.open(self.path, os.O_RDONLY), os.getpid()
        return self._fd

    def read(self, index: np.ndarray) -> np.ndarray:
        fd = self._handle()
        raw = np.empty((len(index), self.row_bytes), dtype=np.uint8)
        for i, row in enumerate(index):
            got = os.preadv(fd, [raw[i]], self.offset + int(row) * self.row_bytes)
            if got != self.row_bytes:
                raise DataError(f"{self.path}: row {int(row)} could not be read whole; the "
                                f"file changed or is truncated")
        values = raw.view(self.file_dtype).reshape(len(index), *self.sample_shape)
        # Types and finiteness are checked on every batch read, as the file is never
        # scanned whole up front.
        return checked_float32(values, lambda r: f"{self.path}: row {int(index[r])}")

    def close(self) -> None:
        if self._fd is not None and self._pid == os.getpid():
            os.close(self._fd)
        self._fd = None

    def __del__(self) -> None:
        try:
            self.close()
        except OSError:
            pass


def _load_labels(path: Path) -> np.ndarray:
    try:
        y = np.load(path, allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise DataError(f"{path}: cannot read the labels as .npy ({exc.__class__.__name__}); "
                        f"write them with numpy.save") from None
    if y.ndim != 1:
        raise DataError(f"{path}: labels must be one per sample, got shape {list(y.shape)}")
    return y


# --------------------------------------------------------------------- folders
class FileRows(Rows):
    """One sample per file, decoded when its row is read."""

    def __init__(self, files: list[Path], decoder: Decoder, source: str) -> None:
        super().__init__(len(files), decoder.shape, source)
        self.files, self.decoder = files, decoder

    def read(self, index: np.ndarray) -> np.ndarray:
        out = np.empty((len(index), *self.sample_shape), dtype=np.float32)
        for i, row in enumerate(index):
            path = self.files[int(row)]
            try:
                out[i] = self.decoder(path)
            except BadFile as exc:
                raise DataError(f"{path}: {exc} (it was readable when the data was "
                                f"loaded; the file changed)") from None
        return out


def _visible(folder: Path) -> list[Path]:
    return sorted(p for p in folder.iterdir() if not p.name.startswith("."))


def _folder_entries(path: Path, need_labels: bool,
                    ) -> tuple[list[Path], list[str] | None, list[str] | None]:
    """Files, their class names and every class (sorted) of a folder, or of its index."""
    if (path / INDEX_FILE).is_file():
        return _index_entries(path / INDEX_FILE, need_labels)
    entries = _visible(path)
    folders = [p for p in entries if p.is_dir()]
    # Anything else is a sample, read (or refused) as one: a broken or looping symbolic
    # link must be named, not silently left out of the data.
    files = [p for p in entries if not p.is_dir()]
    if folders and files:
        raise DataError(f"{path}: holds both class folders and loose files ("
                        f"{files[0].name}); keep one folder per class, or only files for "
                        f"unlabelled data")
    if not folders:
        if not files:
            raise DataError(f"{path}: the folder is empty; put one folder per class in it, "
                            f"each holding that class's files")
        if need_labels:
            raise DataError(f"{path}: holds files but no class folders; labelled data needs "
                            f"one folder per class (or an {INDEX_FILE} with file,label)")
        return files, None, None
    out_files: list[Path] = []
    labels: list[str] = []
    for folder in folders:
        inside = [p for p in _visible(folder) if not p.is_dir()]
        if not inside:
            raise DataError(f"{folder}: the class folder holds no files; remove it or add "
                            f"samples")
        out_files += inside
        labels += [folder.name] * len(inside)
    return out_files, labels, [f.name for f in folders]


def _index_entries(path: Path, need_labels: bool,
                   ) -> tuple[list[Path], list[str] | None, list[str] | None]:
    """An index CSV: ``file`` (relative to the index's folder) and ``label`` columns."""
    rows = read_csv_rows(path)
    header = [h.strip() for h in rows[0]]
    if "file" not in header:
        raise DataError(f"{path}: an index needs a 'file' column (and 'label' for labelled "
                        f"data)")
    if need_labels and "label" not in header:
        raise DataError(f"{path}: no column named 'label' in the index; add the class of "
                        f"each file")
    fi = header.index("file")
    li = header.index("label") if "label" in header else None
    files: list[Path] = []
    labels: list[str] = []
    for n, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise DataError(f"{path}: line {n} has {len(row)} fields, the header {len(header)}")
        files.append(path.parent / row[fi].strip())
        if li is not None:
            labels.append(row[li].strip())
    if not files:
        raise DataError(f"{path}: the index lists no files")
    return files, (labels if li is not None else None), None


def _not_a_file(path: Path) -> str:
    if path.is_symlink():
        return "it is a symbolic link that leads to no file (broken, or in a loop)"
    if path.exists():
        return "it is not a regular file"
    return "no such file"


def _read_files(origin: Path, entries: tuple[list[Path], list[str] | None, list[str] | None],
                shape: tuple[int, ...], skip_bad: bool | None, rate: int | None,
                budget_bytes: int) -> Source:
    """Decode every listed file once: refuse (or skip) bad ones, keep samples that fit."""
    files, labels, class_names = entries
    decoder = Decoder(tuple(shape), rate=rate, rate_from_spec=rate is not None)
    keep = int(np.prod(shape, dtype=np.int64)) * 4 * len(files) <= budget_bytes
    decoded: list[np.ndarray] = []
    good: list[Path] = []
    good_labels: list[str] = []
    bad: list[str] = []
    for i, f in enumerate(files):
        try:
            if not f.is_file():
                raise BadFile(_not_a_file(f))
            sample = decoder(f)
        except BadFile as exc:
            if not skip_bad:  # None: the verb has no --skip-bad, so none is suggested
                offer = "" if skip_bad is None else ", or pass --skip-bad to leave bad files out"
                raise DataError(f"{f}: {exc}; fix or remove the file{offer}") from None
            bad.append(f"{f}: {exc}")
            continue
        good.append(f)
        if labels is not None:
            good_labels.append(labels[i])
        if keep:
            decoded.append(sample)
    if not good:
        raise DataError(f"{origin}: none of its {len(files)} files could be read")
    x: np.ndarray | Rows = np.stack(decoded) if keep else FileRows(good, decoder, str(origin))
    src = Source(x, None if labels is None else np.asarray(good_labels), str(origin),
                 class_names=class_names, ids=[str(f) for f in good], skipped=bad,
                 notes=decoder.notes())
    if bad:
        src.notes.append(f"skipped {len(bad)} bad file(s) (--skip-bad)")
    if not keep:
        src.notes.append(f"{len(good)} files streamed from disk (their decoded size is "
                         f"above the memory budget)")
    if class_names is not None:
        lost = sorted(set(class_names) - set(good_labels))
        if lost:
            raise DataError(f"{origin}: class folder(s) {', '.join(lost)} lost every file "
                            f"to --skip-bad; fix those files or remove the folders")
    return src


# --------------------------------------------------------------------- entry point
def _from_content(path: Path, content: bytes, need_labels: bool) -> Source:
    """An .npz or a CSV of feature rows from bytes already in memory (``path``: its name)."""
    suffix = path.suffix.lower()
    if suffix == ".npz":
        arrays = read_npz(path, content)
        if "x" not in arrays:
            raise DataError(f"{path}: no array named 'x' (found: {', '.join(arrays) or 'none'})")
        return Source(arrays["x"], arrays.get("y"), str(path), label_name="y")
    if suffix == ".csv":
        try:
            return read_csv(path, need_labels, content)
        except IsIndex:
            raise DataError(f"{path}: an index of files cannot be read from memory; its files "
                            f"are not in it") from None
    raise DataError(f"{path}: only .npz and .csv data can be read from memory")


def open_source(path: str | Path, shape: tuple[int, ...], labels: str | Path | None = None,
                need_labels: bool = True, skip_bad: bool | None = None, rate: int | None = None,
                budget_bytes: int = 1 << 30, content: bytes | None = None) -> Source:
    """Read the samples and raw labels at ``path``; ``labels`` is a ``.npy`` of labels.

    With ``content``, nothing is opened: the bytes are an .npz or a CSV of feature rows and
    ``path`` only names them (its suffix says which, messages quote it).
    """
    path = Path(path)
    if content is not None:
        src = _from_content(path, content, need_labels)
    elif not path.exists():
        raise DataError(f"{path}: no such data file or folder")
    elif skip_bad and not (path.is_dir() or path.suffix.lower() == ".csv"):
        raise DataError(f"{path}: --skip-bad applies to class folders and index files only")
    elif path.is_dir():
        src = _read_files(path, _folder_entries(path, need_labels), shape, skip_bad, rate,
                          budget_bytes)
    else:
        suffix = path.suffix.lower()
        if suffix == ".npz":
            arrays = read_npz(path)
            if "x" not in arrays:
                raise DataError(f"{path}: no array named 'x' (found: "
                                f"{', '.join(arrays) or 'none'})")
            if ("x_val" in arrays) != ("y_val" in arrays):
                raise DataError(f"{path}: give both x_val and y_val, or neither")
            src = Source(arrays["x"], arrays.get("y"), str(path), x_val=arrays.get("x_val"),
                         y_val=arrays.get("y_val"), label_name="y")
        elif suffix == ".csv":
            try:
                src = read_csv(path, need_labels)
            except IsIndex:
                src = _read_files(path, _index_entries(path, need_labels), shape, skip_bad,
                                  rate, budget_bytes)
        elif suffix == ".npy":
            src = Source(NpyRows(path), None, str(path))
            src.notes += src.x.notes
        else:
            raise DataError(f"{path}: unknown data format {suffix or '(none)'}; use .npz, "
                            f".csv, .npy (with --labels) or a folder")
    if labels is not None:
        if not isinstance(src.x, NpyRows):
            raise DataError(f"--labels goes with a .npy file of samples, not {path.name}; "
                            f"this format carries its own labels")
        src.y = _load_labels(Path(labels))
    if need_labels and src.y is None:
        if isinstance(src.x, NpyRows):
            raise DataError(f"{path}: a .npy file holds samples only; give their labels with "
                            f"--labels LABELS.npy")
        raise DataError(f"{path}: no array named 'y' with the labels; add one")
    return src


def source_digest(path: str | Path, labels: str | Path | None = None) -> str:
    """SHA-256 of a data source as a whole: one file, every file of a folder, or a
    ``.npy`` with its labels file, so a seal's probe is pinned whatever its format.

    A single file hashes as the file itself (the digest older seals recorded). A folder
    hashes the sorted list of its visible files, each as its path relative to the folder
    and its own SHA-256, so a renamed, added, removed or changed file changes it.
    """
    path = Path(path)
    if path.is_file() and labels is None:
        return _file_sha256(path)
    whole = hashlib.sha256()
    if path.is_dir():
        for file in sorted(p for p in path.rglob("*") if p.is_file()
                           and not any(part.startswith(".") for part in p.relative_to(path).parts)):
            # os.fsencode: a name's own bytes (UTF-8 for every valid name, so digests are
            # unchanged), also for a name that is not valid UTF-8.
            whole.update(os.fsencode(file.relative_to(path).as_posix()) + b"\0"
                         + f"{_file_sha256(file)}\n".encode())
    else:
        whole.update(f"samples\0{_file_sha256(path)}\n".encode())
    if labels is not None:
        whole.update(f"labels\0{_file_sha256(Path(labels))}\n".encode())
    return whole.hexdigest()


def _file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
