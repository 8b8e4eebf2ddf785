"""The command-line shell: exit codes, one-line errors, outputs."""

import json

import pytest

from swerve import __version__
from swerve.cli import main


def test_version(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0
    assert __version__ in capsys.readouterr().out


def test_no_command_prints_help(capsys):
    assert main([]) == 2
    assert "galaxy" in capsys.readouterr().out


def test_galaxy_prints_model_and_measurements(capsys):
    assert main(["galaxy"]) == 0
    out = capsys.readouterr().out
    assert "swerve-mw-1" in out and "MiyamotoNagaiDisk" in out
    assert "Eilers" in out and "Williams" in out
    # v_c(8.122) of the default model, 232.5 km/s (cf. test_galaxy)
    assert "232.5" in out


def test_galaxy_json_and_params(capsys):
    assert main(["galaxy", "--json", "--param", "q_z=0.7", "--radii", "50"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["galaxy"]["name"] == "swerve-mw-1+custom"
    assert out["negative_density_region"]["axis"] == "z"
    assert out["negative_density_region"]["m_over_rs"] == pytest.approx(2.05, rel=3e-3)


def test_galaxy_plot(tmp_path, capsys):
    path = tmp_path / "curves.png"
    assert main(["galaxy", "--plot", str(path)]) == 0
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temp left over


@pytest.mark.parametrize(
    "argv, fragment",
    [
        (["galaxy", "--param", "q_z=-1"], "q_z"),
        (["galaxy", "--param", "q_z"], "NAME=VALUE"),
        (["galaxy", "--param", "q_z=abc"], "not a number"),
        (["galaxy", "--param", "qq=1"], "unknown Galaxy parameter"),
        (["galaxy", "--model", "nope"], "unknown Galaxy model"),
        (["galaxy", "--radii", "a,b"], "--radii"),
        (["galaxy", "--plot", "/nonexistent/dir/x.png"], "does not exist"),
    ],
)
def test_galaxy_bad_input_is_one_line(argv, fragment, capsys):
    assert main(argv) == 1
    err = capsys.readouterr().err
    assert fragment in err
    assert err.count("\n") == 1 and "Traceback" not in err


@pytest.mark.parametrize("command", ["mock", "train", "fit", "validate", "forecast"])
@pytest.mark.parametrize("flag", ["--template", "--print-config"])
def test_every_configured_command_prints_its_template_alone(command, flag, capsys):
    """Both spellings print the configuration template, with no other argument needed."""
    assert main([command, flag]) == 0
    out = capsys.readouterr().out
    assert out.lstrip().startswith(("#", "[")) and "=" in out


def test_fit_without_a_catalog_says_so(capsys):
    assert main(["fit"]) != 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "CATALOG" in err[0]


def test_help_loads_neither_numba_nor_astropy():
    """Building every parser (what `swerve --help` does) imports only light modules: the help
    texts quote swerve.vocabulary, the library is imported by each command's run. A check of the
    modules loaded, not of time."""
    import subprocess
    import sys

    code = ("import sys\nfrom swerve.cli import main\ntry:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
            "for cmd in ('fit', 'trace', 'mock', 'galaxy'):\n    try:\n        main([cmd, '--help'])\n"
            "    except SystemExit:\n        pass\n"
            "print(sorted(m for m in ('numba', 'astropy', 'scipy', 'matplotlib') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "[]"


def test_galaxy_prints_each_value_with_its_models_source(capsys):
    """swerve-mw-2's values carry its own sources (not the parameter declarations'), and its
    v_c(8.122 kpc) = 244.0 km/s (cf. tests/test_galaxy.py)."""
    assert main(["galaxy", "--model", "swerve-mw-2"]) == 0
    out = capsys.readouterr().out
    assert "PlummerBulge" in out and "244.0" in out
    assert "source: Bajkova & Bobylev 2016" in out and "Law & Majewski" not in out
    assert "Halo density is positive everywhere." in out
