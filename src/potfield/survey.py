"""A survey folder: survey.toml, raw/ (read-only inputs), out/ (everything potfield writes).

::

    SURVEY/
      survey.toml
      raw/            the user's files; potfield never writes here
      truth/          demo surveys only: the true components (never read by the pipeline)
      out/
        tables/       readings.csv (the residual table), crossovers.csv, lines.csv, checks.csv ...
        grids/        *.nc (NetCDF-CF), *.tif when asked
        maps/         *.png
        cache/        per-stage tables (parquet) for skipping unchanged stages
        report.html
        manifest.json
"""

from __future__ import annotations

import glob
import hashlib
import os
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from .config import SurveyConfig, load_config
from .errors import ConfigError, InputDataError, OutputError, SurveyLockedError


def sha256_file(path: Path, chunk: int = 1 << 20) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(chunk):
            digest.update(block)
    return digest.hexdigest()


@dataclass
class Survey:
    root: Path

    def __post_init__(self):
        self.root = Path(self.root).resolve()

    # --- layout -------------------------------------------------------------------------------
    @property
    def config_path(self) -> Path:
        return self.root / "survey.toml"

    @property
    def raw(self) -> Path:
        return self.root / "raw"

    @property
    def out(self) -> Path:
        return self.root / "out"

    @property
    def tables(self) -> Path:
        return self.out / "tables"

    @property
    def grids(self) -> Path:
        return self.out / "grids"

    @property
    def maps(self) -> Path:
        return self.out / "maps"

    @property
    def cache(self) -> Path:
        return self.out / "cache"

    @property
    def manifest_path(self) -> Path:
        return self.out / "manifest.json"

    @property
    def report_path(self) -> Path:
        return self.out / "report.html"

    def make_out(self) -> None:
        for path in (self.tables, self.grids, self.maps, self.cache):
            path.mkdir(parents=True, exist_ok=True)

    def rel(self, path) -> str:
        """``path`` relative to the survey folder when inside it, else absolute."""
        path = Path(path).resolve()
        try:
            return str(path.relative_to(self.root))
        except ValueError:
            return str(path)

    def output_checksums(self, cache: dict | None = None) -> dict[str, str]:
        """SHA-256 of every file in out/tables, out/grids, out/maps and of out/report.html.

        ``cache`` (path -> (size, mtime_ns, digest)) lets the runner skip re-hashing files
        that did not change since its last call.
        """
        paths = [
            p
            for folder in (self.tables, self.grids, self.maps)
            if folder.is_dir()
            for p in sorted(folder.glob("*"))
            if p.is_file() and not p.name.startswith(".")
        ]
        if self.report_path.is_file():
            paths.append(self.report_path)
        files = {}
        for path in paths:
            stat = path.stat()
            known = cache.get(str(path)) if cache is not None else None
            if known is not None and known[:2] == (stat.st_size, stat.st_mtime_ns):
                digest = known[2]
            else:
                digest = sha256_file(path)
                if cache is not None:
                    cache[str(path)] = (stat.st_size, stat.st_mtime_ns, digest)
            files[self.rel(path)] = digest
        return files

    def refresh_manifest_outputs(self) -> None:
        """Rewrite manifest.json's output checksums from the files now in out/ (after
        ``potfield report`` redrew the maps and the report). Call under :meth:`lock`."""
        import json

        from .io.atomic import write_json

        if not self.manifest_path.is_file():
            return
        try:
            manifest = json.loads(self.manifest_path.read_text())
        except (OSError, json.JSONDecodeError):
            return
        manifest["outputs"] = self.output_checksums()
        write_json(self.manifest_path, manifest)

    # --- config and inputs -------------------------------------------------------------------
    def load_config(self) -> SurveyConfig:
        if not self.root.is_dir():
            raise ConfigError(f"{self.root}: no such survey folder", fix="check the path")
        return load_config(self.config_path)

    def resolve(self, relative: str) -> Path:
        """A path given in survey.toml, relative to the survey folder."""
        path = Path(relative)
        return path if path.is_absolute() else self.root / path

    def input_files(self, config: SurveyConfig) -> list[Path]:
        """The files matched by ``[input] files``, sorted; an error when none match."""
        found: list[Path] = []
        for pattern in config.input.files:
            full = str(self.resolve(pattern))
            matches = sorted(Path(p) for p in glob.glob(full))
            if not matches:
                if any(ch in pattern for ch in "*?["):
                    raise InputDataError(
                        f"no file matches '{pattern}'",
                        file=self.config_path,
                        key="input.files",
                        fix="put the survey files in raw/ or correct the pattern",
                    )
                raise InputDataError(
                    "file not found",
                    file=self.resolve(pattern),
                    key="input.files",
                    fix="check the file name in survey.toml",
                )
            found.extend(matches)
        # unique, keep order
        seen, unique = set(), []
        for path in found:
            if path not in seen:
                seen.add(path)
                unique.append(path)
        return unique

    # --- lock -----------------------------------------------------------------------------------
    @contextmanager
    def lock(self):
        """Exclusive lock on the survey's out/ so two runs cannot write it at once.

        An OSError while writing out/ inside the lock (permission denied, disk full, a file
        where a folder should be) becomes a one-line :class:`OutputError`; the lock is released.
        """
        path = self.out / ".lock"
        try:
            self.out.mkdir(parents=True, exist_ok=True)
        except OSError as err:  # out/ is a file, read-only parent, ...
            raise self._output_error(err) from None
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
        except FileExistsError:
            pid = _read_pid(path)
            if pid is not None and not _alive(pid):
                path.unlink(missing_ok=True)  # stale lock of a dead run
                fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            else:
                raise SurveyLockedError(
                    f"{self.root}: another potfield run (pid {pid}) is processing this survey",
                    fix=f"wait for it to finish, or delete {path} if no run is active",
                ) from None
        except OSError as err:
            raise self._output_error(err) from None
        try:
            os.write(fd, str(os.getpid()).encode())
            os.close(fd)
            yield
        except OSError as err:
            if not self._is_output_error(err):
                raise
            raise self._output_error(err) from None
        finally:
            try:
                path.unlink(missing_ok=True)
            except OSError:
                pass

    def _is_output_error(self, err: OSError) -> bool:
        """A write failure under out/ (not, e.g., an input file that vanished mid-run)."""
        import errno

        if err.errno not in (
            errno.EACCES,
            errno.EPERM,
            errno.EROFS,
            errno.ENOSPC,
            errno.EDQUOT,
            errno.ENOTDIR,
            errno.EISDIR,
            errno.EEXIST,
        ):
            return False
        if not err.filename:
            return True
        try:
            Path(err.filename).resolve().relative_to(self.out)
        except ValueError:
            return False
        return True

    def _output_error(self, err: OSError) -> OutputError:
        target = Path(err.filename) if err.filename else self.out
        reason = (err.strerror or str(err)).lower()
        return OutputError(
            f"cannot write to {target}: {reason}",
            fix=f"make {self.out} writable (or free disk space) and run again; raw/ is never written",
        )


def _read_pid(path: Path) -> int | None:
    try:
        return int(path.read_text().strip() or "0") or None
    except (OSError, ValueError):
        return None


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
