"""deploy/seawall.example.toml documents every setting and never drifts from the code."""
from __future__ import annotations

import dataclasses
from pathlib import Path

from ops.config import Config, example_toml, iter_settings, load_config

EXAMPLE = Path(__file__).resolve().parents[1] / "deploy" / "seawall.example.toml"
REGENERATE = "python -c 'import ops.config as c; print(c.example_toml(), end=\"\")' > deploy/seawall.example.toml"


def test_committed_example_is_the_generated_one():
    assert EXAMPLE.read_text() == example_toml(), f"the example config is stale; regenerate it: {REGENERATE}"


def test_example_reads_back_as_the_defaults():
    loaded = load_config(environ={}, config_file=EXAMPLE)
    assert loaded == load_config(environ={})
    assert loaded == Config()


def test_example_names_every_setting():
    text = EXAMPLE.read_text()
    for name, *_ in iter_settings():
        section, _, leaf = name.rpartition(".")
        assert f"\n{leaf} = " in text, name
        if section:
            assert f"\n[{section}]\n" in text, section


def test_a_changed_value_in_the_example_is_what_load_config_returns(tmp_path):
    edited = tmp_path / "seawall.toml"
    edited.write_text(EXAMPLE.read_text().replace("\nbatch = 256\n", "\nbatch = 64\n", 1))
    config = load_config(environ={}, config_file=edited)
    assert config.worker.batch == 64
    assert dataclasses.replace(config, worker=Config().worker) == Config()
