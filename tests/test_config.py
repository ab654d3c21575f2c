"""Config schema: parsing, per-axis broadcast, --set overrides, one-line errors."""

from __future__ import annotations

import re

import pytest

from pipeline.config import SCHEMA, describe_schema, load_config
from pipeline.errors import ConfigError

from .conftest import write_config

# The example of the issue (README "Configs": the minimal config).
ISSUE_EXAMPLE = """\
[model]
type = "lattice"
size = [2000]            # sites per axis
boundary = ["periodic"]  # per axis
forward = [1.3]          # hop rate toward +1, per axis
backward = [0.4]         # hop rate toward -1, per axis

[solve]
modes = 12
backend = "scipy"
"""

LATTICE_2D = """\
[model]
type = "lattice"
size = [4, 4]
boundary = ["periodic", "reflecting"]
forward = [1.0, 0.5]
backward = [1.0, 0.5]
"""


def test_issue_example_parses(tmp_path):
    config = load_config(write_config(tmp_path, "ring-2000", ISSUE_EXAMPLE))
    assert config.model.type == "lattice"
    assert config.model.size == (2000,)
    assert config.model.boundary == ("periodic",)
    assert config.model.forward == (1.3,)
    assert config.model.backward == (0.4,)
    assert config.model.disorder is None
    assert config.solve.modes == 12
    assert config.solve.backend == "scipy"
    # run.name defaults to the file's stem (schema: "default: the config file's stem").
    assert config.run.name == "ring-2000"


def test_scalar_per_axis_fields_broadcast(tmp_path):
    text = """\
[run]
name = "cube"
[model]
type = "lattice"
size = [4, 5, 6]
boundary = "reflecting"
forward = 0.5
backward = 2
"""
    model = load_config(write_config(tmp_path, "cube", text)).model
    assert model.size == (4, 5, 6)
    assert model.boundary == ("reflecting",) * 3
    assert model.forward == (0.5, 0.5, 0.5)
    assert model.backward == (2.0, 2.0, 2.0)
    assert all(isinstance(rate, float) for rate in model.backward)


def test_scalar_size_is_one_axis(tmp_path):
    text = '[model]\ntype = "lattice"\nsize = 7\n'
    model = load_config(write_config(tmp_path, "chain", text)).model
    assert model.size == (7,)
    assert model.boundary == ("periodic",)  # schema default
    assert model.forward == (1.0,) and model.backward == (1.0,)  # schema defaults


def test_overrides(tmp_path):
    path = write_config(tmp_path, "ring", ISSUE_EXAMPLE)
    config = load_config(path, ["solve.modes=3", "model.forward[0]=2.5", "run.name=renamed"])
    assert config.solve.modes == 3
    assert config.model.forward == (2.5,)
    assert config.run.name == "renamed"
    # A list value replaces the whole field; a scalar broadcasts over the axes.
    config = load_config(path, ["model.size=[10, 20]", 'model.boundary=["periodic", "absorbing"]',
                                "model.forward=[0.5, 0.75]", "model.backward=0.25"])
    assert config.model.size == (10, 20)
    assert config.model.boundary == ("periodic", "absorbing")
    assert config.model.forward == (0.5, 0.75)
    assert config.model.backward == (0.25, 0.25)
    # Overrides are read as TOML values; anything else is a plain string.
    config = load_config(path, ["solve.backend=auto", "solve.tolerance=1e-10",
                                "solve.vectors=true"])
    assert config.solve.backend == "auto"
    assert config.solve.tolerance == 1e-10
    assert config.solve.vectors is True


def test_element_override_then_length_is_checked(tmp_path):
    path = write_config(tmp_path, "ring", ISSUE_EXAMPLE)
    config = load_config(path, ["model.forward[0]=2.5"])
    assert config.model.forward == (2.5,)
    with pytest.raises(ConfigError, match=r"model\.forward: expected 2 entries"):
        load_config(path, ["model.size=[10, 20]", 'model.boundary=["periodic", "absorbing"]'])


def test_overrides_keep_the_file_unchanged(tmp_path):
    path = write_config(tmp_path, "ring", ISSUE_EXAMPLE)
    load_config(path, ["solve.modes=3"])
    assert load_config(path).solve.modes == 12


def test_negative_rate_exact_message(tmp_path):
    text = LATTICE_2D.replace("forward = [1.0, 0.5]", "forward = [1.0, -2]")
    with pytest.raises(ConfigError) as info:
        load_config(write_config(tmp_path, "bad", text))
    assert str(info.value) == "model.forward[1]: rate must be >= 0, got -2"


BAD_FIELDS = {
    "unknown field": (
        LATTICE_2D + "[solve]\nmode = 3\n",
        r"^solve\.mode: unknown field; did you mean 'modes'\?",
    ),
    "unknown model field": (
        LATTICE_2D.replace("size = [4, 4]", "size = [4, 4]\nboundry = 'periodic'"),
        r"^model\.boundry: unknown field; did you mean 'boundary'\?",
    ),
    "zero size": (
        LATTICE_2D.replace("size = [4, 4]", "size = [4, 0]"),
        r"^model\.size\[1\]: sites per axis must be >= 2, got 0$",
    ),
    "wrong boundary name": (
        LATTICE_2D.replace('"reflecting"', '"reflective"'),
        r"^model\.boundary\[1\]: expected one of .*got 'reflective'$",
    ),
    "wrong list length": (
        LATTICE_2D.replace("backward = [1.0, 0.5]", "backward = [1.0, 0.5, 0.2]"),
        r"^model\.backward: expected 2 entries \(one per axis of model\.size\), got 3$",
    ),
    "both rates zero": (
        LATTICE_2D.replace("forward = [1.0, 0.5]", "forward = [1.0, 0]")
        .replace("backward = [1.0, 0.5]", "backward = [1.0, 0.0]"),
        r"^model\.forward\[1\], model\.backward\[1\]: both zero",
    ),
    "modes below one": (
        LATTICE_2D + "[solve]\nmodes = 0\n",
        r"^solve\.modes: must be >= 1",
    ),
    "invalid TOML": (
        LATTICE_2D + "[solve\nmodes = 3\n",
        r"invalid TOML",
    ),
    # A run is the directory STORE/RUN of a zarr v3 store, whose root metadata file is
    # STORE/zarr.json (zarr v3 specification, "Storage": node metadata in zarr.json).
    "run name of the root metadata": (
        '[run]\nname = "zarr.json"\n' + LATTICE_2D,
        r"^run\.name: 'zarr\.json' ",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD_FIELDS))
def test_bad_config_one_line_error(tmp_path, case):
    text, pattern = BAD_FIELDS[case]
    with pytest.raises(ConfigError, match=pattern) as info:
        load_config(write_config(tmp_path, "bad", text))
    assert "\n" not in str(info.value)


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match=r"not found") as info:
        load_config(tmp_path / "nowhere.toml")
    assert "\n" not in str(info.value)
    assert "nowhere.toml" in str(info.value)


@pytest.mark.parametrize(
    ("override", "pattern"),
    [
        ("solve.modes", r"expected KEY=VALUE"),
        ("modes=3", r"expected SECTION\.FIELD"),
        ("model.forward[3]=1.0", r"index 3 out of range"),
        ("solve.modes=-1", r"^solve\.modes: must be >= 1"),
        ("model.forward[1]=-2", r"^model\.forward\[1\]: rate must be >= 0, got -2$"),
    ],
)
def test_bad_override(tmp_path, override, pattern):
    path = write_config(tmp_path, "ok", LATTICE_2D)
    with pytest.raises(ConfigError, match=pattern) as info:
        load_config(path, [override])
    assert "\n" not in str(info.value)


def test_describe_schema_mentions_every_field():
    reference = describe_schema()
    for section, fields in SCHEMA.items():
        table = section.split(":")[0]
        assert f"[{table}]" in reference, section
        for name, (kind, _default, meaning) in fields.items():
            assert re.search(rf"\|\s*`{re.escape(name)}`\s*\|", reference), (section, name)
            assert kind in reference
            # Meanings may have '|' escaped for Markdown tables.
            assert meaning.replace("|", "\\|") in reference


@pytest.mark.parametrize("text", ["2024-06-01", "1e3", "inf", "true", "42"])
def test_override_of_a_string_field_keeps_the_text(tmp_path, text):
    # In TOML, 2024-06-01 is a local date, 1e3 and inf are floats, true a boolean (TOML 1.0
    # specification, "Local Date", "Float", "Boolean"): as the value of a field declared
    # "string" (run.name, store.path) they can only mean the text itself.
    path = write_config(tmp_path, "ring", ISSUE_EXAMPLE)
    config = load_config(path, [f"run.name={text}", f"store.path={text}"])
    assert config.run.name == text
    assert config.store.path == text
    # Typed fields keep the TOML reading.
    with pytest.raises(ConfigError, match=r"^solve\.modes: expected a whole number"):
        load_config(path, ["solve.modes=2024-06-01"])
