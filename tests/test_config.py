"""[tool.nnlint] configuration and command-line overrides."""
import textwrap

import pytest

from nnlint.config import ConfigError, Settings, load, override, settings_from_table
from tests.conftest import run_cli

HAZARD = "import torch\nmodel = torch.nn.Linear(2, 2)\nmodel.eval\n"


def project(tmp_path, table: str):
    (tmp_path / "pyproject.toml").write_text("[tool.nnlint]\n" + textwrap.dedent(table))
    (tmp_path / "src").mkdir()
    (tmp_path / "src" / "train.py").write_text(HAZARD)
    (tmp_path / "tests").mkdir()
    (tmp_path / "tests" / "test_train.py").write_text(HAZARD)


def test_select_and_ignore_follow_flake8_longest_prefix():
    settings = Settings(select=("NNL4",), ignore=("NNL403",))
    assert not settings.is_selected("NNL403") and settings.is_selected("NNL401")
    settings = Settings(select=("NNL403",), ignore=("NNL4",))
    assert settings.is_selected("NNL403") and not settings.is_selected("NNL401")
    assert not Settings(select=("NNL3",)).is_selected("NNL403")
    assert not Settings(ignore=("NNL",)).is_selected("NNL403")


def test_off_by_default_codes_need_an_explicit_select():
    # flake8's DecisionEngine: an explicit select beats an implicit (default) ignore.
    settings = Settings(default_ignore=("NNL999",))
    assert not settings.is_selected("NNL999")
    assert Settings(select=("NNL",), default_ignore=("NNL999",)).is_selected("NNL999")
    assert not Settings(select=("NNL",), ignore=("NNL9",),
                        default_ignore=("NNL999",)).is_selected("NNL999")
    assert Settings(select=("NNL999",), default_ignore=("NNL999",)).is_selected("NNL999")


def test_ignore_in_pyproject_is_applied(tmp_path):
    project(tmp_path, 'ignore = ["NNL4"]\n')
    result = run_cli("check", ".", cwd=tmp_path)
    assert (result.returncode, result.stdout) == (0, "")


def test_per_file_ignores_and_exclude(tmp_path):
    project(tmp_path, '[tool.nnlint.per-file-ignores]\n"tests/*" = ["NNL403"]\n')
    result = run_cli("check", ".", cwd=tmp_path)
    assert [line.split(":")[0] for line in result.stdout.splitlines()] == ["src/train.py"]
    (tmp_path / "pyproject.toml").write_text('[tool.nnlint]\nexclude = ["src"]\n')
    result = run_cli("check", ".", cwd=tmp_path)
    assert [line.split(":")[0] for line in result.stdout.splitlines()] == ["tests/test_train.py"]


def test_config_is_found_from_a_subfolder_path(tmp_path):
    project(tmp_path, 'ignore = ["NNL403"]\n')
    result = run_cli("check", str(tmp_path / "src"), cwd=tmp_path.parent)
    assert (result.returncode, result.stdout) == (0, "")


def test_command_line_overrides_the_file(tmp_path):
    project(tmp_path, 'ignore = ["NNL403"]\n')
    result = run_cli("check", "--ignore", "NNL001", "src", cwd=tmp_path)
    assert result.returncode == 1 and "NNL403" in result.stdout


def test_unknown_key_exits_2_naming_key_file_and_accepted_keys(tmp_path):
    project(tmp_path, 'selekt = ["NNL"]\n')
    result = run_cli("check", ".", cwd=tmp_path)
    assert (result.returncode, result.stdout) == (2, "")
    assert result.stderr == (f"nnlint: {tmp_path / 'pyproject.toml'}: [tool.nnlint] unknown key "
                             f"'selekt'; accepted keys: exclude, ignore, per-file-ignores, "
                             f"precision, select\n")


def test_bad_precision_names_the_accepted_values(tmp_path):
    project(tmp_path, 'precision = "fp8"\n')
    result = run_cli("check", ".", cwd=tmp_path)
    assert result.returncode == 2
    assert result.stderr == (f"nnlint: {tmp_path / 'pyproject.toml'}: precision 'fp8' unknown; "
                             f"choose bfloat16, float16, float32, float64\n")


def test_bad_code_prefix_and_invalid_toml(tmp_path):
    with pytest.raises(ConfigError, match="'E501' is not an nnlint code prefix"):
        settings_from_table({"select": ["E501"]}, "pyproject.toml", ".")
    (tmp_path / "pyproject.toml").write_text("[tool.nnlint\nselect = 1\n")
    with pytest.raises(ConfigError, match="invalid TOML"):
        load([str(tmp_path)], str(tmp_path / "pyproject.toml"))


def test_override_validates_flags():
    with pytest.raises(ConfigError, match="--precision 'half' unknown"):
        override(Settings(), precision="half")
    assert override(Settings(), select="NNL3, NNL401").select == ("NNL3", "NNL401")
    assert override(Settings(), per_file_ignores="tests/*:NNL4 x.py:NNL1,NNL2"
                    ).per_file_ignores == (("tests/*", ("NNL4",)), ("x.py", ("NNL1", "NNL2")))
