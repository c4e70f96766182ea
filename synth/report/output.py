"""Files: check the destinations, stage every file and rename it into place; build_report."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Sequence

from ..runs import Run
from .candidates import ReportError
from .draw import figure_png
from .page import html_page, report_data
from .style import FIGURE_KEYS


def _check_destination(path: Path, what: str) -> None:
    if path.exists() and path.is_dir():
        raise ReportError(f"{what} {path}: is a folder; expected a file path such as {path / 'report.html'}")
    parent = path.parent
    if not parent.is_dir():
        raise ReportError(f"{what} {path}: the folder {parent} does not exist; expected an existing folder")
    try:
        fd, tmp = tempfile.mkstemp(dir=parent, prefix=f".{path.name}.", suffix=".tmp")
        os.close(fd)
        os.unlink(tmp)
    except OSError as e:
        raise ReportError(f"{what} {path}: cannot write there ({e.strerror or e}); expected a writable "
                          "location") from None


def _check_png_dir(d: Path) -> None:
    if d.exists() and not d.is_dir():
        raise ReportError(f"--png {d}: exists and is not a folder; expected a folder for the PNG files")
    probe = d if d.exists() else next((p for p in d.parents if p.exists()), Path("."))
    if not probe.is_dir() or not os.access(probe, os.W_OK | os.X_OK):
        raise ReportError(f"--png {d}: cannot write in {probe}; expected a writable folder")


def png_names() -> list[str]:
    return [f"{i}-{k}.png" for i, k in enumerate(FIGURE_KEYS + ("model-set",), start=1)]   # 8th: model sets only


def write_outputs(html_text: str, html_path: Path, images: list[bytes], png_dir: Path | None) -> list[Path]:
    """Stage every file next to its destination, then rename them into place.

    On any failure the staged files (and a PNG folder this call created) are removed
    and ReportError is raised; nothing is half-written.
    """
    staged: list[tuple[str, Path]] = []
    created_dir = False

    umask = os.umask(0)
    os.umask(umask)

    def stage(dest: Path, data: bytes) -> None:
        fd, tmp = tempfile.mkstemp(dir=dest.parent, prefix=f".{dest.name}.", suffix=".tmp")
        staged.append((tmp, dest))
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.chmod(tmp, 0o666 & ~umask)          # mkstemp's 0600 would hide the report from colleagues

    try:
        stage(html_path, html_text.encode("utf-8"))
        if png_dir is not None:
            if not png_dir.exists():
                png_dir.mkdir(parents=True)
                created_dir = True
            for name, data in zip(png_names(), images):
                stage(png_dir / name, data)
    except OSError as e:
        for tmp, _ in staged:
            if os.path.exists(tmp):
                os.unlink(tmp)
        if created_dir:
            try:
                png_dir.rmdir()
            except OSError:
                pass
        where = e.filename or html_path
        raise ReportError(f"{where}: cannot write the report ({e.strerror or e}); expected a writable "
                          "location") from None
    for tmp, dest in staged:
        os.replace(tmp, dest)
    return [dest for _, dest in staged]


def build_report(run: Run, ids: Sequence[int] | None = None, out: Path | None = None,
                 png: Path | None = None) -> Path:
    """Write the report of ``run`` (``ids`` or the front) to ``out`` (default RUN/report.html),
    and the figures as PNG files into ``png`` when given. Returns the HTML path.

    Raises ReportError (bad output path, too many ids, empty run) or ArchiveError
    (unknown id); nothing is written then.
    """
    out = Path(out) if out is not None else Path(run.folder) / "report.html"
    png = Path(png) if png is not None else None
    _check_destination(out, "-o")
    if png is not None:
        _check_png_dir(png)
    data = report_data(run, ids)
    images = [figure_png(fd) for fd in data.figures]
    write_outputs(html_page(data, images), out, images, png)
    return out
