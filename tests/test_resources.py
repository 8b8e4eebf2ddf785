"""The shipped emulator is found from any working directory (issue: `swerve fit` outside the clone)."""

from __future__ import annotations

import json

from swerve import resources


def test_default_emulator_found_from_any_working_directory(tmp_path, monkeypatch):
    monkeypatch.delenv("SWERVE_EMULATOR", raising=False)
    monkeypatch.chdir(tmp_path)  # no emulators/ here
    path = resources.default_emulator()
    assert path.is_absolute()
    doc = json.loads((path / "emulator.json").read_text())
    assert doc["format_version"]  # a real emulator file, not just a folder name
    assert (path / "arrays.npz").is_file()


def test_environment_variable_takes_precedence(tmp_path, monkeypatch):
    monkeypatch.setenv("SWERVE_EMULATOR", str(tmp_path / "mine"))
    assert resources.default_emulator() == tmp_path / "mine"


def test_installed_copy_preferred_to_the_source_tree(tmp_path, monkeypatch):
    installed, source = tmp_path / "installed", tmp_path / "source"
    for folder in (installed, source):
        folder.mkdir()
        (folder / "emulator.json").write_text("{}")
    monkeypatch.delenv("SWERVE_EMULATOR", raising=False)
    monkeypatch.setattr(resources, "_candidates", lambda: [installed, source])
    assert resources.default_emulator() == installed
    (installed / "emulator.json").unlink()
    assert resources.default_emulator() == source


def test_missing_everywhere_names_the_install_location(tmp_path, monkeypatch):
    monkeypatch.delenv("SWERVE_EMULATOR", raising=False)
    monkeypatch.setattr(resources, "_candidates", lambda: [tmp_path / "a", tmp_path / "b"])
    assert resources.default_emulator() == tmp_path / "a"


def test_fit_outside_the_repository_uses_the_shipped_emulator(tmp_path, monkeypatch, capsys):
    """`swerve fit --template` needs no emulator; a catalog with no usable star fails on the
    catalog, not on a missing emulator folder, when run from a folder without emulators/."""
    from swerve.cli import main

    monkeypatch.delenv("SWERVE_EMULATOR", raising=False)
    monkeypatch.chdir(tmp_path)
    bad = tmp_path / "empty.csv"
    bad.write_text("id,ra,dec\n")
    code = main(["fit", str(bad), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 1
    assert "emulator" not in err and "empty.csv" in err  # it got as far as reading the catalog
    assert not (tmp_path / "out").exists()


def test_build_hook_copies_every_file_of_the_shipped_emulator():
    """setup.py copies exactly these files into the package; the shipped folder must hold exactly them."""
    import ast
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]  # the repository, whether swerve is installed editable or not
    setup_py = root / "setup.py"
    tree = ast.parse(setup_py.read_text())
    listed = next(ast.literal_eval(node.value) for node in ast.walk(tree)
                  if isinstance(node, ast.Assign) and getattr(node.targets[0], "id", "") == "EMULATOR_FILES")
    shipped = root / "emulators" / "default"
    assert sorted(p.name for p in shipped.iterdir() if not p.name.startswith(".")) == sorted(listed)
