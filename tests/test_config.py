"""Config validation: good files load, bad files say file, key path and what was expected."""

from pathlib import Path

import pytest

from maskrun.daemon.config import ConfigError, demo_config_text, load_config, load_demo_config, parse_config


def test_demo_config_is_the_documented_default_bench():
    cfg = load_demo_config()
    assert cfg.masks.count == 8
    assert tuple(cfg.grid.shape) == (128, 128)
    assert cfg.run.passes == 3
    assert cfg.simulation is not None
    assert cfg.camera.driver == "simulated"
    assert cfg.modulator.driver == "serial-line" and cfg.safety.driver == "serial-line"


def test_repo_demo_file_matches_embedded_copy():
    repo_copy = Path(__file__).resolve().parents[1] / "configs" / "demo.toml"
    assert repo_copy.read_text() == demo_config_text()


def _with(text: str, old: str, new: str) -> str:
    assert old in text, old
    return text.replace(old, new, 1)


def test_unknown_key_is_named_with_its_path():
    bad = _with(demo_config_text(), "passes = 3", "passes = 3\npasess = 4")
    with pytest.raises(ConfigError) as exc:
        parse_config(bad, "bench.toml")
    assert "bench.toml: run.pasess: unknown key" in str(exc.value)


def test_wrong_type_names_the_key_and_the_value():
    bad = _with(demo_config_text(), "exposure_s = 0.01", 'exposure_s = "fast"')
    with pytest.raises(ConfigError) as exc:
        parse_config(bad, "bench.toml")
    msg = str(exc.value)
    assert "camera.exposure_s" in msg and "'fast'" in msg


def test_zero_masks_is_refused_with_a_reason():
    bad = _with(demo_config_text(), "count = 8", "count = 0")
    with pytest.raises(ConfigError) as exc:
        parse_config(bad, "bench.toml")
    assert "masks.count" in str(exc.value) and "at least one mask" in str(exc.value)


def test_missing_table_is_reported():
    with pytest.raises(ConfigError) as exc:
        parse_config('[laser]\nlaser_class = "2"\nwavelength_m = 5.32e-7\npower_w = 0.001\n', "tiny.toml")
    msg = str(exc.value)
    for table in ("camera", "response", "modulator", "safety"):
        assert f"tiny.toml: {table}: required key is missing" in msg


def test_malformed_toml_names_the_file_and_the_line(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("[run]\npasses = = 3\n")
    with pytest.raises(ConfigError) as exc:
        load_config(p)
    assert str(p) in str(exc.value) and "not valid TOML" in str(exc.value) and "line 2" in str(exc.value)


def test_missing_file_says_so(tmp_path):
    with pytest.raises(ConfigError) as exc:
        load_config(tmp_path / "nope.toml")
    assert "file not found" in str(exc.value)


def test_laser_class_must_be_an_iec_class():
    # IEC 60825-1:2014 defines classes 1, 1M, 2, 2M, 3R, 3B and 4 (common practice, no source beyond the standard's list).
    bad = _with(demo_config_text(), 'laser_class = "3R"', 'laser_class = "3A"')
    with pytest.raises(ConfigError) as exc:
        parse_config(bad, "bench.toml")
    assert "laser.laser_class" in str(exc.value)


def test_good_file_round_trips_from_disk(tmp_path):
    p = tmp_path / "bench.toml"
    p.write_text(demo_config_text())
    cfg = load_config(p)
    assert cfg.source_path == str(p)
    assert cfg.source_text == demo_config_text()


def test_response_needs_data_sheet_values_or_a_profile():
    text = demo_config_text()
    no_gain = _with(text, "[response]                  # counts -> photons; from the data sheet until 'maskrun calibrate' gives a profile\ngain_dn_per_e = 0.3\n",
                    "[response]\n")
    with pytest.raises(ConfigError) as exc:
        parse_config(no_gain, "bench.toml")
    assert "bench.toml: response: give gain_dn_per_e (data sheet), or profile" in str(exc.value)
    # a profile alone is enough (what 'maskrun calibrate' tells the user to write)
    profile_only = _with(no_gain, "offset_dn = 100.0\nquantum_efficiency = 0.6\n", 'profile = "cam.json"\n')
    cfg = parse_config(profile_only, "bench.toml")
    assert cfg.response.gain_dn_per_e is None and cfg.response.profile == "cam.json"


def test_a_watchdog_shorter_than_one_frame_is_refused_when_the_bench_is_built():
    """The safety box's watchdog must outlast one frame's silence towards it (settle + exposure +
    grab timeout), else the box would close the shutter during normal frames."""
    from maskrun.daemon.acquire.bench import build_bench

    text = _with(demo_config_text(), "exposure_s = 0.01", "exposure_s = 4.0")
    with pytest.raises(ConfigError) as exc:
        build_bench(parse_config(text, "bench.toml"))
    msg = str(exc.value)
    assert "bench.toml: safety.settings.watchdog_s: 5 s is not longer than" in msg and "6.02 s" in msg
    bench = build_bench(parse_config(_with(text, "watchdog_s = 5.0", "watchdog_s = 10.0"), "bench.toml"))
    bench.close()
