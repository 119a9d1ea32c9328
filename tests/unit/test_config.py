"""Config validation: typos, wrong types, ranges, paths, analyses (issue 2).

Reference: common practice — the checks are of our own contract (clear errors naming the file,
the key, the bad value and what is allowed), not of external numbers.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest

from corrpipe.config import config_reference, load_config, parse_config
from corrpipe.errors import ConfigError
from corrpipe.settings import setting


@dataclass(frozen=True)
class Alpha:
    """Toy table."""

    path: str = setting("data.fits", "input file", path=True)
    s_max: float = setting(150.0, "largest separation", unit="Mpc/h", low=0.0, low_open=True)
    n_mu: int = setting(100, "number of mu bins", low=1, high=10000)
    los: str = setting("midpoint", "line of sight", choices=("midpoint", "endpoint", "bisector"))
    edges: tuple[float, ...] = setting((1.0, 2.0), "bin edges", low=0.0)
    columns: dict[str, str] = setting(None, "column mapping", factory=lambda: {"ra": "RA"})
    r_d: float | None = setting(None, "sound horizon", unit="Mpc", low=50.0, high=300.0)
    flag: bool = setting(False, "a switch")


CLASSES = {"alpha": Alpha}


def parse(text: str, tmp_path: Path):
    f = tmp_path / "run.toml"
    f.write_text(text)
    return load_config(f, classes=CLASSES)


def test_defaults_and_relative_paths(tmp_path):
    cfg = parse("[alpha]\npath = 'cat/x.fits'\n", tmp_path)
    a = cfg.analyses[0].alpha
    assert a.s_max == 150.0 and a.n_mu == 100 and a.los == "midpoint"
    assert Path(a.path) == tmp_path / "cat" / "x.fits"
    assert cfg.analyses[0].name == "main"
    assert Path(cfg.run.output) == tmp_path / "corrpipe_run"


def test_int_accepted_for_float_and_lists_become_tuples(tmp_path):
    a = parse("[alpha]\ns_max = 200\nedges = [0, 5, 10]\n", tmp_path).analyses[0].alpha
    assert a.s_max == 200.0 and isinstance(a.s_max, float)
    assert a.edges == (0.0, 5.0, 10.0)


@pytest.mark.parametrize(
    "text, fragments",
    [
        ("[alpha]\ns_mx = 3\n", ["run.toml", "[alpha]", "unknown key 's_mx'", "did you mean 's_max'"]),
        ("[alpah]\n", ["unknown table [alpah]", "did you mean 'alpha'"]),
        ("[alpha]\nn_mu = 'ten'\n", ["[alpha] n_mu", "'ten'", "expected an integer"]),
        ("[alpha]\nn_mu = 2.5\n", ["[alpha] n_mu", "expected an integer"]),
        ("[alpha]\nflag = 1\n", ["[alpha] flag", "expected true or false"]),
        ("[alpha]\ns_max = -1\n", ["[alpha] s_max = -1", "out of range", "(0.0, inf]", "Mpc/h"]),
        ("[alpha]\ns_max = 0\n", ["out of range"]),
        ("[alpha]\nn_mu = 0\n", ["[alpha] n_mu = 0", "[1, 10000]"]),
        ("[alpha]\nlos = 'midpont'\n", ["'midpont' is not allowed", "'midpoint'", "did you mean"]),
        ("[alpha]\nedges = [1, -2]\n", ["[alpha] edges[1] = -2.0", "out of range"]),
        ("[alpha]\nr_d = 10\n", ["[alpha] r_d = 10.0", "[50.0, 300.0]"]),
        ("[alpha]\ncolumns = 'RA'\n", ["[alpha] columns", "expected a table"]),
        ("[alpha\n", ["not valid TOML"]),
        ("[run]\nseed = -3\n", ["[run] seed = -3", "out of range"]),
        ("[analyses.lo]\nalpah = {s_max = 3}\n", ["[analyses.lo] has unknown table 'alpah'",
                                                   "did you mean 'alpha'"]),
        ("[analyses.lo]\nalpha = {s_max = -3}\n", ["[analyses.lo.alpha] s_max = -3"]),
    ],
)
def test_bad_values_have_clear_errors(tmp_path, text, fragments):
    with pytest.raises(ConfigError) as err:
        parse(text, tmp_path)
    msg = str(err.value)
    for frag in fragments:
        assert frag in msg, (frag, msg)


def test_missing_file_error(tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "nope.toml", classes=CLASSES)


def test_analyses_override_shared_tables(tmp_path):
    cfg = parse(
        "[alpha]\ns_max = 160\nn_mu = 50\n"
        "[analyses.low]\nalpha = {s_max = 120}\n"
        "[analyses.high.alpha]\nn_mu = 20\n",
        tmp_path,
    )
    assert [a.name for a in cfg.analyses] == ["low", "high"]
    low, high = cfg.analyses
    assert (low.alpha.s_max, low.alpha.n_mu) == (120.0, 50)
    assert (high.alpha.s_max, high.alpha.n_mu) == (160.0, 20)
    assert cfg.analysis_folder(low) == Path(cfg.run.output) / "low"
    with pytest.raises(ConfigError, match="no analysis named 'hihg'.*did you mean 'high'"):
        cfg.analysis("hihg")


def test_settings_are_frozen(tmp_path):
    a = parse("", tmp_path).analyses[0].alpha
    with pytest.raises(Exception):
        a.s_max = 3.0  # type: ignore[misc]


def test_parse_config_without_file_uses_cwd():
    cfg = parse_config("[alpha]\nn_mu = 4\n", classes=CLASSES)
    assert cfg.analyses[0].alpha.n_mu == 4


def test_readme_config_reference_is_current():
    # The README reproduces `corrpipe settings`; regenerate it when a setting changes
    # (common practice: documentation generated from the declarations stays in step).
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text()
    from corrpipe.config import config_reference

    assert config_reference().rstrip() in readme, (
        "README's 'Config reference' is out of date: paste the output of `corrpipe settings`")


def test_neutral_default_keys_stay_out_of_fingerprints_until_set():
    # A key added later whose default reproduces the old behaviour must not make stored
    # stages stale (resumable, fingerprinted stages: common practice for pipelines).
    import dataclasses as _dc

    from corrpipe.fit.settings import FitSettings
    from corrpipe.settings import fingerprint_values

    plain = FitSettings()
    values = fingerprint_values(plain)
    assert "interloper_line" not in values
    assert values["sigma_s"] == plain.sigma_s
    neutral = {f.name for f in _dc.fields(FitSettings) if f.metadata.get("neutral_default")}
    assert "interloper_line" in neutral
    assert set(values) == {f.name for f in _dc.fields(FitSettings)} - neutral
    chosen = FitSettings(target_line="Lya", interloper_line="OII")
    assert fingerprint_values(chosen)["interloper_line"] == "OII"
    assert chosen.model_hash() != plain.model_hash()
