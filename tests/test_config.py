"""The station configuration file, its environment overrides and ``clampd check-config``."""

from __future__ import annotations

import datetime as dt
import grp
import tomllib
from pathlib import Path

import pytest

from clampd.daemon.cli import main
from clampd.daemon.runtime._config import (
    CalibrationState,
    ConfigError,
    PlaintextRemoteError,
    apply_env_overrides,
    calibration_state,
    check_broker_transport,
    load_config,
    parse_config,
)

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "deploy" / "station.example.toml"
TODAY = dt.date(2027, 1, 10)

MINIMAL = """
[station]
id = "st-1"
name = "bench"
topic_prefix = "site/area/line/st-1"
[broker]
url = "mqtt://127.0.0.1:1883"
[[wrench]]
id = "w1"
address = "c4:7a:10:00:3e:21"
torque_max = 50
calibration_due = 2027-06-30
"""


def _paths(exc: ConfigError) -> list[str]:
    return [p.path for p in exc.problems]


def _write(tmp_path: Path, text: str, mode: int = 0o600) -> Path:
    p = tmp_path / "station.toml"
    p.write_text(text)
    p.chmod(mode)
    return p


def test_example_file_is_valid_and_fully_used() -> None:
    loaded = load_config(EXAMPLE, env={}, check_files=False, today=TODAY)
    cfg = loaded.config
    assert cfg.station.id == "st-040"
    assert cfg.station.topic_prefix.split("/")[-1] == cfg.station.id
    assert cfg.broker.tls
    assert cfg.broker.port == 8883
    assert [w.id for w in cfg.wrench] == ["w-040-a", "w-040-b"]
    assert [p["id"] for p in cfg.program] == ["cover-m8-torque"]
    assert loaded.warnings == ()
    assert cfg.wrench[0].torque_max_nm == 60.0
    assert cfg.wrench[1].axis == "+z"  # the default axis of protocol/PROFILE.md


def test_example_with_real_files_through_env_overrides(tmp_path: Path) -> None:
    for name in ("ca.crt", "st.crt", "st.key"):
        (tmp_path / name).write_text("-----BEGIN TEST-----\n")
    (tmp_path / "st.key").chmod(0o644)
    env = {
        "CLAMPD__BROKER__TLS_CA": str(tmp_path / "ca.crt"),
        "CLAMPD__BROKER__TLS_CERT": str(tmp_path / "st.crt"),
        "CLAMPD__BROKER__TLS_KEY": str(tmp_path / "st.key"),
        "CLAMPD__OUTBOX__PATH": str(tmp_path / "outbox.db"),
        "CLAMPD__BROKER__KEEPALIVE_S": "60",
        "CLAMPD__WRENCH__1__CALIBRATION_DUE": "2027-01-20",
        "UNRELATED": "x",
    }
    loaded = load_config(EXAMPLE, env=env, today=TODAY)
    cfg = loaded.config
    assert cfg.broker.keepalive_s == 60  # "60" from the environment became an int
    assert cfg.outbox.path == tmp_path / "outbox.db"
    assert cfg.wrench[1].calibration_due == dt.date(2027, 1, 20)
    assert any("tls_key" in w and "chmod 600" in w for w in loaded.warnings)
    assert any("w-040-b" in w and "due on 2027-01-20" in w for w in loaded.warnings)
    (tmp_path / "st.key").chmod(0o600)
    assert not any("tls_key" in w for w in load_config(EXAMPLE, env=env).warnings)


def test_missing_referenced_files_are_errors_unless_skipped() -> None:
    with pytest.raises(ConfigError) as info:
        load_config(EXAMPLE, env={}, today=TODAY)
    assert _paths(info.value) == ["broker.tls_ca", "broker.tls_cert", "broker.tls_key"]


def test_every_problem_is_reported_at_once_with_its_path() -> None:
    text = """
[station]
id = "st 1"
name = "x"
topic_prefix = "a/+/b"
[broker]
url = "http://host"
keepalive = 30
[[wrench]]
id = "w1"
address = "C4:7A:10:00:3E:21"
torque_max = "18 deg"
[[wrench]]
id = "w2"
adress = "nope"
torque_max = 10
"""
    with pytest.raises(ConfigError) as info:
        parse_config(text, env={})
    paths = _paths(info.value)
    assert set(paths) == {
        "station.id",
        "station.topic_prefix",
        "broker.url",
        "broker.keepalive",
        "wrench[0].torque_max",
        "wrench[1].address",
        "wrench[1].adress",
    }
    messages = {p.path: p.message for p in info.value.problems}
    assert messages["broker.keepalive"] == "unknown key (check the spelling)"
    assert messages["wrench[1].address"] == "required key is missing"
    assert "not a torque" in messages["wrench[0].torque_max"]
    assert "mqtt:// or mqtts://" in messages["broker.url"]


@pytest.mark.parametrize(
    ("url", "allowed"),
    [
        ("mqtt://127.0.0.1", True),
        ("mqtt://127.3.2.1:1884", True),  # all of 127/8 is loopback (RFC 1122 §3.2.1.3)
        ("mqtt://localhost", True),
        ("mqtt://[::1]:1883", True),  # RFC 4291 §2.5.3
        ("mqtts://10.20.30.40", True),
        ("mqtt://10.20.30.40", False),
        ("mqtt://broker.plant.example", False),
        ("mqtt://[fe80::1]", False),
    ],
)
def test_plaintext_only_to_loopback(url: str, allowed: bool) -> None:
    if allowed:
        check_broker_transport(url, allow_plaintext_remote=False)
    else:
        with pytest.raises(PlaintextRemoteError, match="allow_plaintext_remote"):
            check_broker_transport(url, allow_plaintext_remote=False)
    check_broker_transport(url, allow_plaintext_remote=True)  # the opt-in always passes


def test_plaintext_remote_in_a_file_names_the_url_field() -> None:
    text = MINIMAL.replace("mqtt://127.0.0.1:1883", "mqtt://192.0.2.7")
    with pytest.raises(ConfigError) as info:
        parse_config(text, env={})
    assert _paths(info.value) == ["broker.url"]
    opted_in = text.replace("[broker]\n", "[broker]\nallow_plaintext_remote = true\n")
    assert parse_config(opted_in, env={}).config.broker.host == "192.0.2.7"


def test_torque_capacity_accepts_units() -> None:
    # 1 ft·lbf = 1.3558179483 N·m exactly (NIST SP 811, B.8).
    text = MINIMAL.replace("torque_max = 50", 'torque_max = "44 ft*lbf"')
    w = parse_config(text, env={}).config.wrench[0]
    assert w.torque_max_nm == pytest.approx(44 * 1.3558179483314004, rel=1e-12)
    assert w.address == "C4:7A:10:00:3E:21"  # normalised to upper case


def test_duplicate_wrenches_and_programs_are_refused() -> None:
    second = '[[wrench]]\nid = "w2"\naddress = "C4:7A:10:00:3E:21"\ntorque_max = 20\n'
    with pytest.raises(ConfigError, match="duplicate wrench address"):
        parse_config(MINIMAL + second, env={})
    programs = '[[program]]\nid = "p1"\n[[program]]\nid = "p1"\n'
    with pytest.raises(ConfigError, match="duplicate program id"):
        parse_config(MINIMAL + programs, env={})
    with pytest.raises(ConfigError, match="needs an id"):
        parse_config(MINIMAL + '[[program]]\nstrategy = "torque"\n', env={})


def test_programs_are_validated_by_the_engine_with_full_paths() -> None:
    good = (
        '[[program]]\nid = "p1"\nstrategy = "torque"\nsnug_torque = "3 N*m"\n'
        'target_torque = "12 N*m"\n'
    )
    assert parse_config(MINIMAL + good, env={}).config.program[0]["id"] == "p1"
    bad = good.replace('"12 N*m"', '"12 deg"') + "colour = 3\n"
    with pytest.raises(ConfigError) as info:
        parse_config(MINIMAL + bad, env={})
    assert set(_paths(info.value)) == {"program[0].target_torque", "program[0].colour"}


def test_broker_secret_rules(tmp_path: Path) -> None:
    both = MINIMAL.replace(
        "[broker]\n", f'[broker]\npassword = "s3"\npassword_file = "{tmp_path}/p"\n'
    )
    with pytest.raises(ConfigError, match="either password or password_file"):
        parse_config(both, env={})
    tls_on_plain = MINIMAL.replace("[broker]\n", f'[broker]\ntls_ca = "{tmp_path}/ca"\n')
    with pytest.raises(ConfigError, match="use mqtts://"):
        parse_config(tls_on_plain, env={})
    creds_in_url = MINIMAL.replace("mqtt://127.0.0.1", "mqtt://u:p@127.0.0.1")
    with pytest.raises(ConfigError, match="credentials"):
        parse_config(creds_in_url, env={})


def test_inline_password_in_a_readable_file_warns(tmp_path: Path) -> None:
    text = MINIMAL.replace("[broker]\n", '[broker]\nusername = "st-1"\npassword = "s3cret"\n')
    loose = _write(tmp_path, text, 0o644)
    loaded = load_config(loose, env={}, today=TODAY)
    assert any("holds broker.password" in w for w in loaded.warnings)
    assert "s3cret" not in repr(loaded.config)  # SecretStr keeps it out of logs
    assert loaded.config.broker.read_password() == "s3cret"
    loose.chmod(0o600)
    assert not any("password" in w for w in load_config(loose, env={}, today=TODAY).warnings)


def test_password_from_the_environment_does_not_blame_the_file(tmp_path: Path) -> None:
    loose = _write(tmp_path, MINIMAL, 0o644)
    loaded = load_config(loose, env={"CLAMPD__BROKER__PASSWORD": "from-env"}, today=TODAY)
    assert loaded.config.broker.read_password() == "from-env"
    assert not any("password" in w for w in loaded.warnings)


def test_group_read_is_fine_only_for_the_service_group(tmp_path: Path) -> None:
    # deploy/BOARD.md installs secrets root:clampd 0640; any other readable group warns.
    key = tmp_path / "st.key"
    key.write_text("k")
    key.chmod(0o640)
    for name in ("ca.crt", "st.crt"):
        (tmp_path / name).write_text("c")
    text = MINIMAL.replace("mqtt://127.0.0.1:1883", "mqtts://127.0.0.1:8883").replace(
        "[broker]\n", '[broker]\ntls_ca = "ca.crt"\ntls_cert = "st.crt"\ntls_key = "st.key"\n'
    )
    path = _write(tmp_path, text)
    own_group = grp.getgrgid(key.stat().st_gid).gr_name
    other = "clampd" if own_group != "clampd" else "nobody-group"
    warned = load_config(path, env={}, today=TODAY, service_group=other).warnings
    assert any(f"readable by group {own_group!r}" in w for w in warned)
    quiet = load_config(path, env={}, today=TODAY, service_group=own_group).warnings
    assert not any("tls_key" in w for w in quiet)
    key.chmod(0o604)
    still = load_config(path, env={}, today=TODAY, service_group=own_group).warnings
    assert any("tls_key" in w and "readable by others" in w for w in still)


def test_password_file_is_read_relative_to_the_config(tmp_path: Path) -> None:
    (tmp_path / "broker.pass").write_text("from-file\n")
    (tmp_path / "broker.pass").chmod(0o640)
    text = MINIMAL.replace("[broker]\n", '[broker]\npassword_file = "broker.pass"\n')
    loaded = load_config(_write(tmp_path, text), env={}, today=TODAY)
    assert loaded.config.broker.password_file == tmp_path / "broker.pass"
    assert loaded.config.broker.read_password() == "from-file"
    assert any("password_file" in w for w in loaded.warnings)  # group-readable


def test_env_overrides_index_arrays_and_report_bad_paths() -> None:
    data = tomllib.loads(MINIMAL)
    applied = apply_env_overrides(
        data,
        {"CLAMPD__WRENCH__0__AXIS": "-y", "CLAMPD__CUES__OUTPUT": "none", "OTHER__X": "1"},
    )
    assert applied == ["cues.output", "wrench[0].axis"]
    assert data["wrench"][0]["axis"] == "-y"
    assert data["cues"] == {"output": "none"}
    with pytest.raises(ConfigError, match="no array element"):
        apply_env_overrides(tomllib.loads(MINIMAL), {"CLAMPD__WRENCH__3__AXIS": "+x"})
    with pytest.raises(ConfigError, match="is a value, not a table"):
        apply_env_overrides(tomllib.loads(MINIMAL), {"CLAMPD__BROKER__URL__HOST": "h"})
    # An override with a bad value fails validation with the usual path.
    with pytest.raises(ConfigError) as info:
        parse_config(MINIMAL, env={"CLAMPD__BROKER__KEEPALIVE_S": "soon"})
    assert _paths(info.value) == ["broker.keepalive_s"]


def test_environment_of_the_process_is_the_default(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CLAMPD__STATION__NAME", "from the environment")
    assert parse_config(MINIMAL).config.station.name == "from the environment"


@pytest.mark.parametrize(
    ("days_before_due", "state"),
    [
        (60, CalibrationState.OK),
        (15, CalibrationState.OK),
        (14, CalibrationState.DUE_SOON),  # 14-day notice: common practice, no source
        (0, CalibrationState.DUE_SOON),  # the due date itself is still usable
        (-1, CalibrationState.OVERDUE),
    ],
)
def test_calibration_state(days_before_due: int, state: CalibrationState) -> None:
    due = dt.date(2027, 3, 1)
    assert calibration_state(due, due - dt.timedelta(days=days_before_due)) is state


def test_overdue_calibration_warns_and_says_whether_it_blocks() -> None:
    text = MINIMAL.replace("2027-06-30", "2026-12-31")
    assert any(
        "overdue since 2026-12-31 (it will be blocked)" in w
        for w in parse_config(text, env={}, today=TODAY).warnings
    )
    relaxed = text + "block_when_calibration_overdue = false\n"
    assert any("(not blocked)" in w for w in parse_config(relaxed, env={}, today=TODAY).warnings)


def test_other_sections_validate() -> None:
    with pytest.raises(ConfigError, match="needs wav_dir"):
        parse_config(MINIMAL + '[cues]\noutput = "wav"\n', env={})
    with pytest.raises(ConfigError) as info:
        parse_config(MINIMAL + "[cues]\nvolume = 1.5\n[outbox]\nsize_cap_mb = 0\n", env={})
    assert _paths(info.value) == ["cues.volume", "outbox.size_cap_mb"]
    cfg = parse_config(MINIMAL + "[outbox]\nsize_cap_mb = 2\n", env={}).config
    assert cfg.outbox.size_cap_bytes == 2 * 1024 * 1024
    assert cfg.client_id == "clampd-st-1"


def test_view_section_defaults_to_loopback_and_validates() -> None:
    cfg = parse_config(MINIMAL, env={}).config
    assert (cfg.view.enabled, cfg.view.bind, cfg.view.port) == (True, "127.0.0.1", 8740)
    example = load_config(EXAMPLE, env={}, check_files=False, today=TODAY).config
    assert example.view == cfg.view
    text = MINIMAL + '[view]\nbind = "localhost"\nport = 0\n'
    assert parse_config(text, env={}).config.view.bind == "127.0.0.1"
    with pytest.raises(ConfigError) as info:
        parse_config(MINIMAL + '[view]\nbind = "station.example"\nport = 70000\n', env={})
    assert _paths(info.value) == ["view.bind", "view.port"]
    env = {"CLAMPD__VIEW__PORT": "8801", "CLAMPD__VIEW__ENABLED": "false"}
    view = parse_config(MINIMAL, env=env).config.view
    assert (view.port, view.enabled) == (8801, False)


def test_a_view_bound_beyond_loopback_warns() -> None:
    for bind, warned in (("0.0.0.0", True), ("192.0.2.10", True), ("::1", False)):
        text = MINIMAL + f'[view]\nbind = "{bind}"\n'
        got = [w for w in parse_config(text, env={}).warnings if w.startswith("view.bind")]
        assert bool(got) is warned, (bind, got)
    off = MINIMAL + '[view]\nenabled = false\nbind = "0.0.0.0"\n'
    assert not any(w.startswith("view.bind") for w in parse_config(off, env={}).warnings)


def test_topic_prefix_not_ending_with_station_id_warns() -> None:
    text = MINIMAL.replace("site/area/line/st-1", "site/area/line/other")
    assert any("does not end with the station id" in w for w in parse_config(text, env={}).warnings)


def test_unreadable_and_malformed_files_are_config_errors(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "missing.toml")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(_write(tmp_path, "[station\nid="), env={})


# -- clampd check-config -------------------------------------------------------------------


def test_check_config_accepts_the_example(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check-config", "--no-file-checks", "--ignore-env", str(EXAMPLE)]) == 0
    out = capsys.readouterr().out
    assert "OK" in out
    assert "st-040" in out


def test_check_config_prints_every_error_and_exits_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    text = (
        MINIMAL.replace("mqtt://127.0.0.1:1883", "mqtt://203.0.113.9").replace(
            "c4:7a:10:00:3e:21", "zz"
        )
        + "[journal]\nlist_limt = 5\n"
    )
    path = _write(tmp_path, text)
    assert main(["check-config", "--ignore-env", str(path)]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 3
    assert all(line.startswith(f"error: {path}: ") for line in err)
    joined = "\n".join(err)
    for field in ("broker.url", "wrench[0].address", "journal.list_limt"):
        assert f": {field}: " in joined


def test_check_config_prints_warnings_and_exits_0(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = _write(tmp_path, MINIMAL.replace("2027-06-30", "2020-01-01"))
    assert main(["check-config", "--ignore-env", str(path)]) == 0
    err = capsys.readouterr().err
    assert "warning: wrench[0] w1: calibration overdue since 2020-01-01" in err
