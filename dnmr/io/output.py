"""Writing results safely: atomically, and never over an existing file unless asked."""
from __future__ import annotations

import math
import os
import sys
import tempfile
from collections.abc import Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from dnmr.errors import InputError


def os_error_text(err: OSError) -> str:
    """One line for a failed file operation: the file, what went wrong, and what to do (the writes here are
    atomic, so nothing half-written is left behind)."""
    import errno

    what = err.strerror or type(err).__name__
    place = err.filename if err.filename is not None else "a file"
    advice = {errno.ENOSPC: "free some space and run again", errno.EDQUOT: "free some space and run again",
              errno.EROFS: "write the results to another folder", errno.EACCES: "check the permissions or "
              "write the results elsewhere", errno.EPERM: "check the permissions or write the results elsewhere"}
    hint = advice.get(err.errno, "check the disk and the path")
    return f"{place}: {what}; {hint} (nothing half-written is left behind)"


def _refuse_existing(path: Path, overwrite: bool) -> None:
    if (path.exists() or path.is_symlink()) and not overwrite:
        raise InputError(f"{path} already exists; choose another name or pass --overwrite", where="output")


def file_mode() -> int:
    """The permissions a new file gets under the current umask (0666 less the umask), so that results
    on a shared disk are as readable as any other file the user writes there."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


FIGURE_FORMATS = ("png", "svg", "pdf", "jpg", "jpeg", "tif", "tiff", "eps", "ps", "webp")
"""Image formats a figure may be written in (from the file suffix)."""


def check_output_file(path: str | Path | None, overwrite: bool, where: str, figure: bool = False) -> Path | None:
    """Refuse, before any work, an output file that cannot be written: an empty name, a folder, an
    existing file (unless `overwrite`), a figure whose suffix names no image format, or a folder to
    write into that does not exist.  Returns `path` as a Path (None stays None).

    Raises
    ------
    InputError
        Naming the option `where` (``-o``, ``--plot``...).
    """
    if path is None:
        return None
    if not str(path).strip():
        raise InputError("the file name is empty; name the file to write", where=where)
    path = Path(path)
    if path.is_dir():
        raise InputError(f"{path} is a folder; name a file to write", where=where)
    if figure and path.suffix.lower().lstrip(".") not in FIGURE_FORMATS:
        raise InputError(f'"{path.suffix or path.name}" is not an image format; end the file name in '
                         f"{', '.join('.' + f for f in FIGURE_FORMATS[:3])}", where=where)
    if not path.parent.is_dir() and path.parent.exists():
        raise InputError(f"{path.parent} is not a folder", where=where)
    if (path.exists() or path.is_symlink()) and not overwrite:
        raise InputError(f"{path} already exists; choose another name or pass --overwrite", where=where)
    return path


def missing_folders(path: str | Path) -> list[Path]:
    """The folders of `path` (itself and its parents) that do not exist yet, deepest first: those that
    creating `path` as a folder would create (give them to :func:`remove_empty_folders` afterwards)."""
    missing = []
    for folder in (Path(path).absolute(), *Path(path).absolute().parents):
        if folder.exists() or folder.is_symlink():
            break
        missing.append(folder)
    return missing


def remove_empty_folders(created: Sequence[Path]) -> None:
    """Remove again the folders a run created (`created`, deepest first, as :func:`missing_folders` gives
    them) when nothing could be written into them: a folder goes only when it is empty once its own empty
    subfolders are gone; a folder holding any file stays, and a link is never followed."""
    for folder in created:
        for root, folders, _ in os.walk(folder, topdown=False):
            for name in folders:
                _remove_if_empty(os.path.join(root, name))
        _remove_if_empty(folder)


def _remove_if_empty(folder: str | Path) -> None:
    try:
        os.rmdir(folder)
    except OSError:  # it holds something (or it is a link, never followed, or gone): it stays
        pass


def atomic_write_bytes(path: str | Path, data: bytes, overwrite: bool = False) -> Path:
    """Write `data` to `path` through a temporary file in the same folder and an atomic rename.

    The file gets the permissions of :func:`file_mode` (the umask's); a link at `path` is replaced by
    the file, never followed.  A failure (a full disk) leaves no partial file behind, nor a folder
    created for the file.
    """
    path = Path(path)
    _refuse_existing(path, overwrite)
    created = missing_folders(path.parent)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    except OSError as err:
        remove_empty_folders(created)
        raise OSError(err.errno, err.strerror, str(path)) from None
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, file_mode())
        os.replace(tmp, path)
    except BaseException as err:
        if os.path.exists(tmp):
            os.unlink(tmp)
        remove_empty_folders(created)
        if isinstance(err, OSError):  # name the file the user asked for, not the temporary one
            raise OSError(err.errno, err.strerror, str(path)) from None
        raise
    return path


def atomic_write_text(path: str | Path, text: str, overwrite: bool = False) -> Path:
    """Write `text` (UTF-8) atomically; see :func:`atomic_write_bytes`."""
    return atomic_write_bytes(path, text.encode("utf-8"), overwrite=overwrite)


#: Formats dnmr's own figure files can be chosen in (--figure-format): raster PNG, or vector SVG and PDF for print.
FIGURE_FORMAT_CHOICES = ("png", "svg", "pdf")
#: The environment variable that carries the format chosen by :func:`figures_as` into worker processes.
FIGURE_FORMAT_VARIABLE = "DNMR_FIGURE_FORMAT"


def chosen_figure_format() -> str:
    """The format of the figures dnmr names itself (png, svg or pdf): png unless :func:`figures_as` chose another."""
    value = os.environ.get(FIGURE_FORMAT_VARIABLE, "png").strip().lower() or "png"
    if value not in FIGURE_FORMAT_CHOICES:
        raise InputError(f"figure format {value!r} is not one of {', '.join(FIGURE_FORMAT_CHOICES)}",
                         where=FIGURE_FORMAT_VARIABLE)
    return value


@contextmanager
def figures_as(figure_format: str):
    """Within this block, every figure dnmr names itself (``*.png``) is written as `figure_format` instead.

    The one place that decides the format of dnmr's own figure files (fit figures, the series stack, the
    global fit's figures, the magnetisation-transfer fit, the demo's): :func:`save_figure` writes a path
    ending in ``.png`` with the chosen suffix.  The choice travels in :data:`FIGURE_FORMAT_VARIABLE`, so
    worker processes started inside the block follow it too.

    Parameters
    ----------
    figure_format : {"png", "svg", "pdf"}
        The format.
    """
    figure_format = figure_format.strip().lower()
    if figure_format not in FIGURE_FORMAT_CHOICES:
        raise InputError(f"figure format {figure_format!r} is not one of {', '.join(FIGURE_FORMAT_CHOICES)}",
                         where="--figure-format")
    before = os.environ.get(FIGURE_FORMAT_VARIABLE)
    os.environ[FIGURE_FORMAT_VARIABLE] = figure_format
    try:
        yield figure_format
    finally:
        if before is None:
            os.environ.pop(FIGURE_FORMAT_VARIABLE, None)
        else:
            os.environ[FIGURE_FORMAT_VARIABLE] = before


def figure_file(path: str | Path) -> Path:
    """Where :func:`save_figure` writes a figure asked for at `path`: a ``.png`` path takes the chosen format's
    suffix (see :func:`figures_as`); any other suffix is kept."""
    path = Path(path)
    return path.with_suffix("." + chosen_figure_format()) if path.suffix.lower() == ".png" else path


#: zlib level of dnmr's PNG files: 1 of 9 writes a line figure in two thirds of the time of the usual 6, for
#: files about a tenth larger (the image is the same: PNG is lossless; :func:`png_file`).
PNG_COMPRESS_LEVEL = 1


def figure_bytes(fig, image_format: str = "png", dpi: int = 150, *, close: bool = False,
                 software_tag: bool = True, inside: bool = False) -> bytes:
    """A matplotlib figure rendered as the bytes of an image file, cropped to what is drawn: the one place
    dnmr renders figures (:func:`save_figure` writes them, the HTML report and the notebook embed them).

    matplotlib finds the crop by laying the figure out once more (``bbox_inches="tight"``), which takes about
    as long as drawing it.  A figure that keeps everything `inside` its edges is, as a PNG on matplotlib's plain
    raster canvas, drawn once and cut to the pixels drawn instead (with matplotlib's padding); should the
    drawing touch an edge after all, matplotlib crops it.

    Parameters
    ----------
    fig : matplotlib Figure
        The figure.
    image_format : str
        ``"png"``, ``"svg"``, ``"pdf"`` ... (see :data:`FIGURE_FORMATS`).
    dpi : int
        Resolution (dots per inch) of raster formats.
    close : bool
        Close the figure afterwards (also when rendering fails).
    software_tag : bool
        False leaves out the PNG's "Software" entry (matplotlib's version), so that the image depends on
        the figure alone.
    inside : bool
        Nothing of the figure lies beyond its edges (no key or text placed outside): it may be cut to its
        pixels.  An artist wholly beyond an edge would be lost.
    """
    import io

    metadata = {} if software_tag else {"Software": None}
    try:
        image = _drawn_once(fig, dpi, metadata) if inside and image_format.lower() == "png" else None
        if image is None:
            buffer = io.BytesIO()
            fig.savefig(buffer, format=image_format, dpi=dpi, bbox_inches="tight", metadata=metadata or None,
                        **({"pil_kwargs": {"compress_level": PNG_COMPRESS_LEVEL}} if image_format.lower() == "png" else {}))
            image = buffer.getvalue()
    finally:
        if close:
            import matplotlib.pyplot as plt

            plt.close(fig)
    return image


def _drawn_once(fig, dpi: int, metadata: dict) -> bytes | None:
    """The PNG of `fig` at `dpi` drawn once on its canvas and cut to what is drawn on it (every pixel not of the
    figure's colour), padded as matplotlib pads a tight box, in the figure's colour.

    None when the canvas is a screen's (not matplotlib's plain raster one, which a figure of no canvas gets and
    keeps, so that a figure drawn again reuses its text layout), the figure has a layout engine, the saved
    background is not the figure's own, or the drawing reaches the figure's edge (it may go on beyond it).
    """
    import matplotlib
    from matplotlib.backend_bases import FigureCanvasBase
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if type(fig.canvas) is FigureCanvasBase:
        FigureCanvasAgg(fig)
    if (type(fig.canvas) is not FigureCanvasAgg or fig.get_layout_engine() is not None
            or matplotlib.rcParams["savefig.transparent"] or matplotlib.rcParams["savefig.facecolor"] != "auto"):
        return None
    before = fig.dpi
    try:
        fig.dpi = dpi
        fig.canvas.draw()
        pixels = np.asarray(fig.canvas.get_renderer().buffer_rgba())
    finally:
        fig.dpi = before
    image = _cut_to_drawing(pixels, round(matplotlib.rcParams["savefig.pad_inches"] * dpi), fig.get_facecolor())
    if image is None:
        return None
    text = {"Software": f"Matplotlib version{matplotlib.__version__}, https://matplotlib.org/", **metadata}
    return png_file(image, dpi, {key: value for key, value in text.items() if value is not None})


def _cut_to_drawing(pixels: np.ndarray, pad: int, colour) -> np.ndarray | None:
    """The smallest rectangle of the RGBA `pixels` (rows top down) that holds every pixel not of `colour` (RGBA,
    0 to 1), with `pad` pixels of `colour` around it: RGB when every pixel is opaque (a quarter less to compress),
    else RGBA; None when the drawing touches the edge or there is none."""
    from PIL import Image

    background = np.round(np.asarray(colour) * 255).astype(np.uint8)
    words, fill = pixels.view(np.uint32)[..., 0], background.view(np.uint32)[0]  # a pixel as one number
    drawn = words != fill
    rows, columns = np.flatnonzero(drawn.any(axis=1)), np.flatnonzero(drawn.any(axis=0))
    if rows.size == 0 or rows[0] == 0 or columns[0] == 0 or rows[-1] == drawn.shape[0] - 1 or \
            columns[-1] == drawn.shape[1] - 1:
        return None
    inside = words[rows[0]:rows[-1] + 1, columns[0]:columns[-1] + 1]
    image = np.full((inside.shape[0] + 2 * pad, inside.shape[1] + 2 * pad), fill, dtype=np.uint32)
    image[pad:pad + inside.shape[0], pad:pad + inside.shape[1]] = inside
    rgba = image.view(np.uint8).reshape(*image.shape, 4)
    if not np.all(rgba[..., 3] == 255):
        return rgba
    return np.asarray(Image.frombuffer("RGBA", image.shape[::-1], image, "raw", "RGBA", 0, 1).convert("RGB"))


def png_file(image: np.ndarray, dpi: int, text: Mapping[str, str]) -> bytes:
    """The PNG file (ISO/IEC 15948) of an RGB or RGBA `image` (rows top down, 8 bits a channel) at `dpi` (dots per
    inch), with `text` entries (Latin-1): every row unfiltered and deflated at :data:`PNG_COMPRESS_LEVEL`.

    Pillow tries every filter on every row, which for dnmr's line figures took three times as long as the whole
    of this for files no smaller."""
    import struct
    import zlib

    height, width, channels = image.shape
    rows = np.empty((height, 1 + width * channels), dtype=np.uint8)
    rows[:, 0] = 0  # filter type 0: the row as it is
    rows[:, 1:] = image.reshape(height, -1)

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))

    per_metre = int(dpi / 0.0254 + 0.5)
    header = struct.pack(">IIBBBBB", width, height, 8, {3: 2, 4: 6}[channels], 0, 0, 0)  # colour type 2 RGB, 6 RGBA
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header) + chunk(b"pHYs", struct.pack(">IIB", per_metre, per_metre, 1))
            + b"".join(chunk(b"tEXt", f"{key}\0{value}".encode("latin-1")) for key, value in text.items())
            + chunk(b"IDAT", zlib.compress(rows, PNG_COMPRESS_LEVEL)) + chunk(b"IEND", b""))


def save_figure(fig, path: str | Path, overwrite: bool = False, dpi: int = 150, close: bool = False,
                inside: bool = False) -> Path:
    """Save a matplotlib figure atomically (format from the file suffix; ``.png`` follows :func:`figures_as`).

    Parameters
    ----------
    fig : matplotlib Figure
        The figure.
    path : str or Path
        File to write (PNG, SVG, PDF...).
    overwrite : bool
        Replace an existing file.
    dpi : int
        Resolution (dots per inch) of raster formats.
    close : bool
        Close the figure afterwards (also when writing fails), as the command line does with the figures
        it only saves; a figure that a notebook goes on showing stays open (the default).
    inside : bool
        Nothing of the figure lies beyond its edges: a PNG is drawn once and cut to its pixels
        (:func:`figure_bytes`).
    """
    try:
        path = check_output_file(figure_file(path), overwrite, "output", figure=True)
        image = figure_bytes(fig, path.suffix.lstrip(".") or "png", dpi, inside=inside)
        return atomic_write_bytes(path, image, overwrite=overwrite)
    finally:
        if close:
            import matplotlib.pyplot as plt

            plt.close(fig)


def new_output_folder(path: str | Path, overwrite: bool = False, inputs=()) -> Path:
    """Create `path` as a folder for results.

    Refuses a folder that already holds files (unless `overwrite`), a file, and a folder inside any of
    the folders in `inputs` (results are never written among the inputs).
    """
    path = Path(path).resolve()
    for folder in inputs:
        folder = Path(folder).resolve()
        if folder == path or folder in path.parents:
            raise InputError(f"{path} lies inside {folder}, among the inputs; name an output folder elsewhere",
                             where="output")
    if path.exists() and not path.is_dir():
        raise InputError(f"{path} is a file; name a folder for the results", where="output")
    if path.is_dir() and any(path.iterdir()) and not overwrite:
        raise InputError(f"{path} already exists and is not empty; choose a new folder or pass --overwrite",
                         where="output")
    path.mkdir(parents=True, exist_ok=True)
    return path


def script_output_folder(default: str, script: str | None) -> Path:
    """The results folder of an example script run as ``python script.py [OUTDIR]`` or cell by cell in a
    notebook (whose kernel passes options such as ``-f``, not an OUTDIR).

    New or empty (:func:`new_output_folder`), and never inside the folder of `script` (the script's
    ``__file__``, None in a notebook), which holds its inputs.  Bad input is one line on stderr and exit
    status 2.
    """
    arg = sys.argv[1] if len(sys.argv) > 1 and not sys.argv[1].startswith("-") else None
    try:
        return new_output_folder(arg or default, inputs=[Path(script).resolve().parent] if script else [])
    except InputError as err:
        print(f"error: {err}", file=sys.stderr)
        raise SystemExit(2) from None


def json_ready(obj):
    """JSON-ready: numpy scalars and arrays to Python, NaN and infinities to None, paths and tuples plain."""
    if isinstance(obj, Mapping):
        return {str(k): json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        if all(type(v) is float for v in obj) and all(map(math.isfinite, obj)):  # a curve: thousands of plain floats
            return list(obj)
        return [json_ready(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return json_ready(obj.tolist())
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj
