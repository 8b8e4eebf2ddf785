"""TOML configuration schemas: validation messages, defaults, canonical hashing."""

import hashlib
import json

import pytest

from swerve.config import (
    REQUIRED,
    ConfigError,
    Key,
    Schema,
    Section,
    canonical_json,
    config_hash,
    defaults,
    load_config,
    template,
    validate,
)

SCHEMA = Schema(
    "train",
    (
        Section("", (Key("name", "str", "run", doc="name of the run"),)),
        Section(
            "design",
            (
                Key("size", "int", 256, min=1, doc="number of design points"),
                Key("method", "str", "sobol", choices=("sobol", "lhs"), doc="space-filling design"),
                Key("seed", "int", REQUIRED, min=0, doc="master seed"),
                Key("q_z", "list[float]", [0.7, 1.3], length=2, min=0.1, max=3.0, doc="range of q_z"),
            ),
            doc="experiment design",
        ),
        Section(
            "launch",
            (
                Key("v_min", "float", 800.0, min=0.0, exclusive_min=True, doc="km/s"),
                Key("isotropic", "bool", True),
                Key("extra", "table", {}, doc="free-form options"),
            ),
        ),
    ),
    doc="swerve training configuration",
)


def write(tmp_path, text, name="train.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_defaults_are_filled_and_types_converted(tmp_path):
    path = write(tmp_path, '[design]\nseed = 3\n[launch]\nv_min = 900\n')
    cfg = load_config(path, SCHEMA)
    assert cfg == {
        "": {"name": "run"},
        "design": {"size": 256, "method": "sobol", "seed": 3, "q_z": [0.7, 1.3]},
        "launch": {"v_min": 900.0, "isotropic": True, "extra": {}},
    }
    assert isinstance(cfg["launch"]["v_min"], float)  # TOML int accepted for a float key
    # validating a validated configuration changes nothing
    assert validate(cfg, SCHEMA) == cfg


def test_unknown_key_names_file_key_and_suggests(tmp_path):
    path = write(tmp_path, "[design]\nseed = 1\nsise = 10\n")
    with pytest.raises(ConfigError) as exc:
        load_config(path, SCHEMA)
    assert str(exc.value) == f"{path}: unknown key [design] sise; did you mean 'size'?"
    assert "\n" not in str(exc.value)


def test_unknown_section_and_top_level_key_suggest(tmp_path):
    with pytest.raises(ConfigError, match=r"train.toml: unknown section \[desing\]; did you mean 'design'\?"):
        validate({"desing": {"seed": 1}}, SCHEMA, source="train.toml")
    with pytest.raises(ConfigError, match=r"unknown key nmae; did you mean 'name'\?"):
        validate({"nmae": "x", "design": {"seed": 1}}, SCHEMA, source="train.toml")
    no_root = Schema("s", (Section("design", (Key("size", "int", 1),)),))
    with pytest.raises(ConfigError, match=r"unknown top-level key size; keys belong in a section \(\[design\]\)"):
        validate({"size": 3}, no_root, source="s.toml")
    with pytest.raises(ConfigError, match=r"unknown key \[design\] zzz$"):  # nothing close: no hint
        validate({"design": {"seed": 1, "zzz": 1}}, SCHEMA)


@pytest.mark.parametrize(
    "text, match",
    [
        ('[design]\nseed = 1\nsize = "ten"\n', r'\[design\] size = "ten" has the wrong type; expected an int >= 1'),
        ("[design]\nseed = 1\nsize = 2.5\n", r"\[design\] size = 2.5 has the wrong type; expected an int"),
        ("[design]\nseed = true\n", r"\[design\] seed = true has the wrong type; expected an int >= 0"),
        ("[design]\nseed = 1\n[launch]\nisotropic = 1\n", r"\[launch\] isotropic = 1 has the wrong type; expected a bool"),
        ("[design]\nseed = 1\nq_z = 0.9\n", r"\[design\] q_z = 0.9 has the wrong type; expected a list of 2 values"),
        ('[design]\nseed = 1\nq_z = [0.7, "x"]\n', r"\[design\] q_z = \[0.7, 'x'\] has the wrong type"),
        ("[design]\nseed = 1\n[launch]\nextra = 3\n", r"\[launch\] extra = 3 has the wrong type; expected a table"),
        ("design = 3\n", r"design = 3 should be a section \[design\], not a value"),
    ],
)
def test_type_errors(tmp_path, text, match):
    path = write(tmp_path, text)
    with pytest.raises(ConfigError, match=r"^" + str(path).replace(".", r"\.") + ": " + match):
        load_config(path, SCHEMA)


@pytest.mark.parametrize(
    "text, match",
    [
        ("[design]\nseed = 1\nsize = -3\n", r"\[design\] size = -3 is out of range; expected an int >= 1$"),
        ("[design]\nseed = -1\n", r"\[design\] seed = -1 is out of range; expected an int >= 0$"),
        ("[design]\nseed = 1\n[launch]\nv_min = 0.0\n", r"\[launch\] v_min = 0 is out of range; expected a float > 0$"),
        ("[design]\nseed = 1\nq_z = [0.7, 3.5]\n", r"q_z = \[0.7, 3.5\] is out of range; expected a list of 2 values, each a float >= 0.1 and <= 3"),
        ("[design]\nseed = 1\nq_z = [0.7]\n", r"\[design\] q_z has 1 values; expected a list of 2 values"),
        ('[design]\nseed = 1\nmethod = "sobel"\n', r"\[design\] method = \"sobel\" is not allowed; expected one of 'sobol', 'lhs'; did you mean 'sobol'\?"),
        ("[design]\nseed = 1\n[launch]\nv_min = nan\n", r"\[launch\] v_min = nan is not finite"),
    ],
)
def test_range_errors(tmp_path, text, match):
    path = write(tmp_path, text)
    with pytest.raises(ConfigError, match=match):
        load_config(path, SCHEMA)


def test_missing_required_key():
    with pytest.raises(ConfigError, match=r"^t.toml: missing required key \[design\] seed; expected an int >= 0 \(master seed\)$"):
        validate({"design": {}}, SCHEMA, source="t.toml")
    with pytest.raises(ConfigError, match="missing required key"):
        defaults(SCHEMA)


def test_syntax_error_names_file_and_line(tmp_path):
    path = write(tmp_path, '[design]\nseed = 1\nsize = = 3\n')
    with pytest.raises(ConfigError) as exc:
        load_config(path, SCHEMA)
    msg = str(exc.value)
    assert msg.startswith(f"{path}: TOML syntax error:") and "line 3" in msg and "\n" not in msg


def test_missing_and_non_utf8_files(tmp_path):
    with pytest.raises(ConfigError, match=r"nope.toml: no such configuration file"):
        load_config(tmp_path / "nope.toml", SCHEMA)
    path = tmp_path / "bin.toml"
    path.write_bytes(b'name = "\xff"\n')
    with pytest.raises(ConfigError, match="bin.toml"):
        load_config(path, SCHEMA)


def test_input_is_not_modified():
    given = {"design": {"seed": 1, "q_z": [0.8, 1.2]}}
    snapshot = json.loads(json.dumps(given))
    cfg = validate(given, SCHEMA)
    cfg["design"]["q_z"].append(5.0)
    assert given == snapshot


def test_hash_is_stable_under_key_order_and_changes_with_values(tmp_path):
    a = load_config(write(tmp_path, '[design]\nseed = 1\nsize = 64\n[launch]\nv_min = 900.0\n', "a.toml"), SCHEMA)
    b = load_config(write(tmp_path, '[launch]\nv_min = 900\n[design]\nsize = 64\nseed = 1\n', "b.toml"), SCHEMA)
    assert config_hash(a) == config_hash(b)
    assert len(config_hash(a)) == 64 and int(config_hash(a), 16) >= 0
    # a default written out equals the default left out
    c = load_config(write(tmp_path, '[design]\nseed = 1\nsize = 64\nmethod = "sobol"\n[launch]\nv_min = 900.0\n', "c.toml"), SCHEMA)
    assert config_hash(c) == config_hash(a)
    for text in ('[design]\nseed = 2\nsize = 64\n[launch]\nv_min = 900.0\n',
                 '[design]\nseed = 1\nsize = 64\n[launch]\nv_min = 900.0000001\n',
                 '[design]\nseed = 1\nsize = 64\n[launch]\nv_min = 900.0\nisotropic = false\n'):
        d = load_config(write(tmp_path, text, "d.toml"), SCHEMA)
        assert config_hash(d) != config_hash(a)
    # the hash is the SHA-256 of the canonical JSON text
    assert config_hash(a) == hashlib.sha256(canonical_json(a).encode()).hexdigest()
    assert canonical_json({"b": 1, "a": [1.5, "é"]}) == '{"a":[1.5,"é"],"b":1}'


def test_canonical_json_refuses_non_json():
    with pytest.raises(ConfigError, match="cannot be hashed"):
        config_hash({"a": float("inf")})
    with pytest.raises(ConfigError, match="cannot be hashed"):
        config_hash({"a": object()})


def test_template_round_trips(tmp_path):
    cfg = validate({"name": "x", "design": {"seed": 7}, "launch": {"extra": {"k": 1, "s": "v"}}}, SCHEMA)
    text = template(SCHEMA, cfg)
    assert "# number of design points (an int >= 1)" in text
    assert load_config(write(tmp_path, text), SCHEMA) == cfg
    blank = template(SCHEMA)
    assert "# seed =   (required)" in blank


def test_schema_declaration_errors():
    with pytest.raises(ValueError, match="type 'double'"):
        Key("x", "double")
    with pytest.raises(ValueError, match="duplicate key"):
        Section("s", (Key("a", "int", 1), Key("a", "int", 2)))
    with pytest.raises(ValueError, match="duplicate section"):
        Schema("x", (Section("s", ()), Section("s", ())))
