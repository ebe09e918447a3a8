"""The site file: the demo loads, every key is documented, and bad files are refused with the
file and the key named."""

from __future__ import annotations

import dataclasses
import re
import typing
from pathlib import Path

import pytest

from sensor.errors import SiteConfigError
from sensor.shell.config import SiteConfig, TagRef, load_site_file, parse_site
from tests.conftest import DEMO_SITE

DEMO_TEXT = DEMO_SITE.read_text(encoding="utf-8")


def _parse(text: str) -> SiteConfig:
    return parse_site(text, DEMO_SITE)


def _edit(old: str, new: str) -> str:
    assert DEMO_TEXT.count(old) == 1, f"the demo site file should hold {old!r} once"
    return DEMO_TEXT.replace(old, new)


def test_demo_site_loads():
    site = load_site_file(DEMO_SITE)
    assert site.path == DEMO_SITE.resolve()
    assert len(site.sha256) == 64
    unit = site.unit[0]
    assert unit.id == "CR-301"
    assert site.solubility.data == (DEMO_SITE.parent / "demo-solubility.csv").resolve()
    assert unit.tags["temp"].node_id(site.opcua.node_id_format) == "ns=2;s=CR301.TT3011.PV"
    assert unit.phase_values["controlled-cooling"] == 6
    assert site.guard.setpoint_range_c == (0.0, 80.0)


def _schema_classes(cls, seen=None):
    seen = set() if seen is None else seen
    if cls in seen:
        return seen
    seen.add(cls)
    for hint in typing.get_type_hints(cls).values():
        for candidate in (hint, *typing.get_args(hint)):
            for inner in (candidate, *typing.get_args(candidate)):
                if dataclasses.is_dataclass(inner):
                    _schema_classes(inner, seen)
    return seen


@pytest.mark.parametrize(
    "cls",
    sorted(_schema_classes(SiteConfig) | {TagRef}, key=lambda c: c.__name__),
    ids=lambda c: c.__name__,
)
def test_every_key_is_documented_in_the_demo_site_file(cls):
    # Keeps config/demo-site.toml (the commented reference) in step with the schema.
    for f in dataclasses.fields(cls):
        if not f.init:
            continue
        as_key = re.search(rf"(^|[\s{{#]){re.escape(f.name)}\s*=", DEMO_TEXT, re.MULTILINE)
        as_table = re.search(rf"\[\[?([\w.]+\.)?{re.escape(f.name)}\]\]?", DEMO_TEXT)
        assert as_key or as_table, f"{cls.__name__}.{f.name} is not documented in {DEMO_SITE.name}"


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        (
            'id = "CR-301"',
            'id = "CR-301"\nsolvent_mass = 3.0',
            r"unit\[0\]\.solvent_mass: unknown key \(did you mean 'solvent_mass_kg'\?\)",
        ),
        ("solvent_mass_kg = 1600.0", "", r"unit\[0\]\.solvent_mass_kg: missing"),
        (
            "solvent_mass_kg = 1600.0",
            "solvent_mass_kg = -5.0",
            r"unit\[0\]\.solvent_mass_kg: must be positive; got -5.0",
        ),
        (
            "solvent_mass_kg = 1600.0",
            'solvent_mass_kg = "1600"',
            r"unit\[0\]\.solvent_mass_kg: must be a number; got a string",
        ),
        (
            "solvent_mass_kg = 1600.0",
            "solvent_mass_kg = nan",
            r"unit\[0\]\.solvent_mass_kg: must be a finite number",
        ),
        (
            'kind = "ukf"',
            'kind = "kalman"',
            r"filter\.kind: must be one of 'ukf', 'ekf'; got 'kalman'",
        ),
        (
            "final_temp_c = 10.0                       # never propose",
            "final_temp_c = 95.0                       # never propose",
            r"guard\.final_temp_c: must lie inside setpoint_range_c",
        ),
        (
            "setpoint_range_c = [0.0, 80.0]",
            "setpoint_range_c = [80.0, 0.0]",
            r"guard\.setpoint_range_c: must be \[low, high\]",
        ),
        (
            'proposal_phases = ["controlled-cooling"]',
            'proposal_phases = ["cooling"]',
            r"guard\.proposal_phases\[0\]: unknown phase 'cooling'",
        ),
        (
            'temp = "CR301.TT3011.PV"',
            "",
            r"unit\[0\]\.tags\.temp: missing \(this signal is required\)",
        ),
        (
            'temp = "CR301.TT3011.PV"',
            'temp = "CR301.TT3011.PV"\npressure = "CR301.PT1"',
            r"unit\[0\]\.tags\.pressure: unknown signal",
        ),
        ('temp = "CR301.TT3011.PV"', "temp = 7", r"unit\[0\]\.tags\.temp: must be a tag name"),
        (
            "seed-hold = 5",
            "seed-hold = 4",
            r"unit\[0\]\.phase_values: two phases share one DCS value",
        ),
        ("write_to_dcs = false", "write_to_dcs = true", None),
        (
            'node_id_format = "ns=2;s={tag}"',
            'node_id_format = "ns=2;s=X"',
            r"opcua\.node_id_format: must contain \{tag\}",
        ),
        (
            'security_policy = "none"',
            'security_policy = "Basic256Sha256"',
            r"opcua\.security_mode: security_policy and security_mode",
        ),
        (
            '# username = "advisor"',
            'password = "hunter2"',
            r"opcua\.password: secrets do not belong in the site file",
        ),
        (
            "volume_shape_factor = 0.45",
            "volume_shape_factor = 0.9",
            r"compound\.volume_shape_factor: cannot exceed pi/6",
        ),
        (
            "molar_mass_g_per_mol = 286.3",
            "",
            r"compound\.molar_mass_g_per_mol: give both molar masses",
        ),
        (
            'method = "nyvlt"',
            'method = "fixed-width"',
            r"metastable\.fixed_width_k: needed when method = 'fixed-width'",
        ),
        ("[site]", "[site\n", r"demo-site\.toml: not valid TOML"),
        ("port = 8730 ", "port = 70000 ", r"live\.port: must be between 0 and 65535; got 70000"),
        ("trend_hours = 4.0 ", "trend_hours = 48.0 ", r"live\.trend_hours: must be between"),
        (
            'host = "127.0.0.1"                        # optional, "127.0.0.1"',
            'host = "0.0.0.0"\nusers_file = "users"  #',
            r"live\.host: '0\.0\.0\.0' is reachable from other machines and users_file lets "
            r"people log in: give certificate and private_key \(HTTPS\)",
        ),
        (
            'host = "127.0.0.1"                        # optional, "127.0.0.1"',
            'host = "0.0.0.0"\nusers_file = "users"\ncertificate = "c.pem"\nprivate_key = "k.pem"#',
            None,
        ),
        (
            'host = "127.0.0.1"                        # optional, "127.0.0.1"',
            'host = ""  #',
            r"live\.host: must name an address",
        ),
        (
            "port = 8730 ",
            'certificate = "c.pem"\nport = 8730 ',
            r"live\.certificate: certificate and private_key go together",
        ),
    ],
)
def test_bad_site_files_are_refused(old, new, message):
    text = _edit(old, new)
    if message is None:  # a valid change
        _parse(text)
        return
    with pytest.raises(SiteConfigError, match=message) as caught:
        _parse(text)
    assert str(caught.value).startswith(str(DEMO_SITE))


def test_write_to_dcs_needs_the_write_tags():
    text = _edit("write_to_dcs = false", "write_to_dcs = true")
    text = text.replace('heartbeat = "CR301.ADVISOR_HEARTBEAT"', "")
    with pytest.raises(
        SiteConfigError, match=r"unit\[0\]\.tags\.heartbeat: needed when opcua\.write_to_dcs = true"
    ):
        _parse(text)


def test_duplicate_unit_ids_refused():
    unit_block = DEMO_TEXT[DEMO_TEXT.index("[[unit]]") :]
    with pytest.raises(SiteConfigError, match=r"unit\[1\]\.id: 'CR-301' is used by two units"):
        _parse(DEMO_TEXT + "\n" + unit_block)


def test_tag_with_explicit_node_id():
    text = _edit(
        'temp = "CR301.TT3011.PV"', 'temp = { name = "CR301.TT3011.PV", node = "ns=3;i=1042" }'
    )
    site = _parse(text)
    assert site.unit[0].tags["temp"].node_id(site.opcua.node_id_format) == "ns=3;i=1042"


def test_unreadable_file(tmp_path: Path):
    with pytest.raises(SiteConfigError, match=r"missing\.toml: cannot be read"):
        load_site_file(tmp_path / "missing.toml")
