"""Config: defaults < file < --set, typed validation, errors naming file and key."""
from __future__ import annotations

import pytest

from curate import api
from curate.config import load_config
from curate.errors import ConfigError
from curate.plan import config_sections


def test_precedence_defaults_file_set(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("[inspect]\nmin_short_side = 300\nmax_aspect = 3.0\n")
    cfg = load_config(f, ["inspect.min_short_side=512"], config_sections())
    assert cfg.inspect.min_short_side == 512  # --set wins over the file
    assert cfg.inspect.max_aspect == 3.0  # the file wins over the default
    assert cfg.inspect.min_file_bytes == 5000  # default (LAION-400M 5 KB floor)


@pytest.mark.parametrize(
    "text,key",
    [
        ("[inspect]\nmin_short_side = 'big'\n", "inspect.min_short_side"),
        ("[inspect]\nno_such_key = 1\n", "inspect.no_such_key"),
        ("[nonsense]\nx = 1\n", "nonsense"),
        ("[input]\nformat = 'zip'\n", "input.format"),
        ("[caption]\nmin_chars = 10\nmax_chars = 5\n", "caption"),
    ],
)
def test_errors_name_file_and_key(tmp_path, text, key):
    f = tmp_path / "bad.toml"
    f.write_text(text)
    with pytest.raises(ConfigError) as e:
        load_config(f, [], config_sections())
    assert str(f) in str(e.value) and key in str(e.value)


def test_invalid_toml_names_file(tmp_path):
    f = tmp_path / "broken.toml"
    f.write_text("[inspect\n")
    with pytest.raises(ConfigError, match="broken.toml"):
        load_config(f, [], config_sections())


def test_set_syntax_error():
    with pytest.raises(ConfigError, match="section.key=value"):
        load_config(None, ["nodot=1"], config_sections())


def test_relative_input_path_is_relative_to_the_file(tmp_path):
    (tmp_path / "sub").mkdir()
    f = tmp_path / "sub" / "c.toml"
    f.write_text("[input]\npath = 'imgs'\n")
    cfg = load_config(f, [], config_sections())
    assert cfg.input.path == str((tmp_path / "sub" / "imgs").resolve())


def test_paths_given_on_the_command_line_are_relative_to_the_working_directory(tmp_path, monkeypatch):
    # Common practice for command-line tools: a path typed on the command line means what the shell
    # around it means, whatever folder the config file lives in.
    (tmp_path / "conf").mkdir()
    (tmp_path / "work" / "bench").mkdir(parents=True)
    f = tmp_path / "conf" / "c.toml"
    f.write_text("[input]\npath = 'in_file'\n[split]\neval_sets = ['bench_file']\n")
    monkeypatch.chdir(tmp_path / "work")
    cfg = load_config(f, ["input.path=imgs", 'split.eval_sets=["bench"]'], config_sections())
    assert cfg.input.path == str((tmp_path / "work" / "imgs").resolve())
    assert cfg.split.eval_sets == [str(tmp_path / "work" / "bench")]
    # what the command line leaves alone stays relative to the file
    assert load_config(f, ["split.eval_sets=[]"], config_sections()).input.path == str(
        (tmp_path / "conf" / "in_file").resolve())


@pytest.mark.parametrize("preset", sorted(api.PRESETS))
def test_init_writes_a_loadable_commented_config(tmp_path, preset):
    p = api.init(tmp_path / "c.toml", preset=preset)
    text = p.read_text()
    for section in ("inspect", "caption", "hashes", "embed", "agreement", "neardup", "risk", "split", "pack"):
        assert f"[{section}]" in text, section
    assert "LAION-400M" in text  # defaults carry their source
    cfg = load_config(p, [], config_sections())
    for section, values in api.PRESETS[preset].items():
        for k, v in values.items():
            assert getattr(cfg.section(section), k) == v


@pytest.mark.parametrize("preset", sorted(api.PRESETS))
def test_pipelines_folder_matches_init(tmp_path, preset):
    """pipelines/<preset>.toml are exactly what `curate init --preset` writes (no drift)."""
    from pathlib import Path

    committed = Path(__file__).resolve().parents[1] / "pipelines" / f"{preset}.toml"
    fresh = api.init(tmp_path / "c.toml", preset=preset)
    assert committed.read_text() == fresh.read_text(), "regenerate with: curate init --force --preset ..."


def test_path_keys_are_relative_to_the_config_file(tmp_path):
    (tmp_path / "conf" / "ckpt").mkdir(parents=True)
    (tmp_path / "conf" / "ckpt" / "w.safetensors").write_bytes(b"")
    (tmp_path / "conf" / "bench").mkdir()
    f = tmp_path / "conf" / "c.toml"
    f.write_text('[embed]\npretrained = "ckpt/w.safetensors"\n[split]\neval_sets = ["bench"]\n')
    cfg = load_config(f, [], config_sections())
    assert cfg.embed.pretrained == str(tmp_path / "conf" / "ckpt" / "w.safetensors")
    assert cfg.split.eval_sets == [str(tmp_path / "conf" / "bench")]
    f.write_text('[embed]\npretrained = "openai"\n')  # a tag, not a path: left as written
    assert load_config(f, [], config_sections()).embed.pretrained == "openai"
