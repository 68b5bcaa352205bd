"""The limen-nightly/1 configuration: validation with one-line errors naming the file, detector matching,
expected-settings flags (DICOM PS3.3 keywords: KVP (0018,0060), Anode Target Material (0018,1191),
Filter Material (0018,7050), Exposure in µAs (0018,1153))."""

import pytest
from helpers import MINI

from scorer.errors import LimenError
from scorer.qc import load_config
from scorer.qc.config import Expected


def _write(tmp_path, body, name="n.toml"):
    p = tmp_path / name
    p.write_text('format = "limen-nightly/1"\n' + body, encoding="utf-8")
    return p


@pytest.mark.parametrize(
    "body,message",
    [
        ("[defaults]\nmin_images = 1\n", "[defaults]: min_images must be in 2–1000, got 1"),
        ("[defaults]\nsurprise = 1\n", "[defaults]: unknown key 'surprise'"),
        ('[[detectors]]\nname = "x"\n', "detectors entry 1: give detector_id, device_serial or station_name"),
        ('[[detectors]]\ndetector_id = "A"\n[[detectors]]\ndetector_id = "A"\n', "name 'A' is used twice"),
        ('[[detectors]]\ndetector_id = "A"\nlayout = "missing.toml"\n', "missing.toml"),
        ('[[detectors]]\ndetector_id = "A"\nobserver = "eye"\n', "observer must be npw or npwe"),
        (
            '[[detectors]]\ndetector_id = "A"\n[detectors.expected]\nexposure_uas = [5, 1]\n',
            "expected.exposure_uas must be [lowest, highest] in µAs",
        ),
        ('[alerts]\nrules = ["magic"]\n', "[alerts] rules must be a list drawn from"),
        ('[smtp]\nhost = "mail"\nrecipients = ["nobody"]\n', "[smtp] recipients must be a list of e-mail addresses"),
        (
            '[[detectors]]\ndetector_id = "A"\nhuman_factor = 2\nhuman_factor_from = "a.json"\n',
            "give human_factor or human_factor_from, not both",
        ),
        ('[receive]\ncalling_ae_titles = ["MAM2_QC"]\n', "[receive] inbox must name the folder"),
        ('[receive]\ninbox = "in"\n', "[receive] calling_ae_titles must list the AE titles"),
        ('[receive]\ninbox = "in"\ncalling_ae_titles = []\n', "[receive] calling_ae_titles must list"),
        # DICOM PS3.5 6.2, VR AE: at most 16 characters, no backslash, no control character
        ('[receive]\ninbox = "in"\ncalling_ae_titles = ["SEVENTEEN_CHARS_X"]\n', "(DICOM AE title)"),
        ('[receive]\ninbox = "in"\ncalling_ae_titles = ["A", "A"]\n', "lists an AE title twice"),
        ('[receive]\ninbox = "in"\ncalling_ae_titles = ["A"]\nae_title = "TAB\\tHERE"\n', "[receive] ae_title"),
        ('[receive]\ninbox = "in"\ncalling_ae_titles = ["A"]\nport = 0\n', "[receive] port must be in 1–65535"),
        ('[receive]\ninbox = "in"\ncalling_ae_titles = ["A"]\nbind = ""\n', "[receive] bind must be"),
        ('[receive]\ninbox = "in"\ncalling_ae_titles = ["A"]\npeers = 1\n', "[receive]: unknown key 'peers'"),
    ],
)
def test_bad_configurations_give_one_line_errors_naming_the_file(tmp_path, body, message):
    p = _write(tmp_path, body)
    with pytest.raises(LimenError) as exc:
        load_config(p)
    text = str(exc.value)
    assert message in text and "\n" not in text
    assert str(p) in text or "missing.toml" in text


def test_wrong_format_and_human_limits_without_factor(tmp_path):
    p = tmp_path / "x.toml"
    p.write_text('format = "other/1"\n')
    with pytest.raises(LimenError, match="expected format"):
        load_config(p)
    from scorer.workflow import EXAMPLE_LIMITS

    p = _write(tmp_path, f'[[detectors]]\ndetector_id = "A"\nlimits = "{EXAMPLE_LIMITS.as_posix()}"\n')
    with pytest.raises(LimenError, match="are for human readers; give human_factor"):
        load_config(p)


def test_matching_defaults_and_unlisted_detectors(tmp_path):
    p = _write(
        tmp_path,
        f'[defaults]\nmin_images = 6\nlayout = "{MINI.as_posix()}"\n'
        '[[detectors]]\nname = "room 2"\nstation_name = "ST-2"\nmin_images = 8\n'
        '[[detectors]]\ndetector_id = "D-1"\n',
    )
    c = load_config(p)
    assert c.detector_for(None, None, "ST-2").name == "room 2"
    assert c.detector_for(None, None, "ST-2").min_images == 8
    assert c.detector_for("D-1", None, None).min_images == 6
    assert c.detector_for("D-1", None, None).layout.name == "mini test plate"
    assert c.detector_for("OTHER", None, None) is None  # accept_unlisted defaults to false
    p2 = _write(tmp_path, "[defaults]\naccept_unlisted = true\n", "m.toml")
    assert load_config(p2).detector_for("OTHER", None, None).name == "OTHER"


def test_expected_settings_flags():
    e = Expected(kvp=28.0, kvp_tolerance=0.5, anode="W", filter="RH", exposure_uas=(40000, 120000))
    assert e.check(28.4, "w", "rh", 80000) == []
    flags = e.check(29.0, "MO", None, 20000)
    assert flags == [
        "kVp 29 (expected 28 ± 0.5)",
        "anode MO (expected W)",
        "filter not recorded (expected RH)",
        "exposure 20 mAs (expected 40–120 mAs)",
    ]


def test_human_factor_from_an_analysis_keeps_its_ci(tmp_path):
    # `human_factor_from` reads the factor as `limen score --human-factor-from` does, CI included, so nightly
    # verdicts carry the factor's uncertainty too (found in review: the factor was cast to float and failed)
    import json

    (tmp_path / "analysis.json").write_text(
        json.dumps(
            {"human_model_factor": {"by_observer": [{"observer": "npw", "factor": 2.1, "ci_low": 1.8, "ci_high": 2.5}]}}
        ),
        encoding="utf-8",
    )
    p = _write(tmp_path, '[[detectors]]\ndetector_id = "D-1"\nhuman_factor_from = "analysis.json"\n')
    hf = load_config(p).detector_for("D-1", None, None).human_factor
    assert (hf.value, hf.ci_low, hf.ci_high) == (2.1, 1.8, 2.5)


def test_receive_table_defaults_and_relative_inbox(tmp_path):
    from scorer.qc.config import load_receive_config

    p = _write(tmp_path, '[receive]\ninbox = "qc-inbox"\ncalling_ae_titles = [" MAM2_QC ", "MAM3_QC"]\n')
    for rc in (load_config(p).receive, load_receive_config(p)):
        # 11112: the port registered for DICOM (IANA service name "dicom"; from memory); loopback unless told
        assert (rc.ae_title, rc.port, rc.bind) == ("LIMEN_QC", 11112, "127.0.0.1")
        assert rc.inbox == str((tmp_path / "qc-inbox").resolve())
        assert rc.calling_ae_titles == ("MAM2_QC", "MAM3_QC")  # leading/trailing spaces are not significant
    assert load_config(_write(tmp_path, "", "plain.toml")).receive is None
