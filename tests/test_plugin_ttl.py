"""The plugin's port table and control mapping, without the LV2 toolchain.

The TTL itself is checked by lilv and lv2_validate in test_plugin_bundle.py; here we check
that the port table follows the settings and that port values map back to settings.
"""

from __future__ import annotations

import math

import pytest
from lv2host import support

from liftmag.settings import Settings, settings_fields

DEFAULT_LIMIT = f"{Settings().reduction_limit_db:g}"  # the default follows the settings

ttl = support.ttl_module()
bridge = support.bridge_module()


def _controls() -> list[dict]:
    return [p.to_json() for p in ttl.control_ports()]


def test_ports_follow_the_settings_fields() -> None:
    port_fields = [f.name for f in settings_fields() if f.metadata.get("lv2_port")]
    assert [p.field for p in ttl.control_ports()] == port_fields
    # The issue names these controls; they must all be there.
    for name in ("estimator", "reduction_limit_db", "target_deg", "mic_spacing_m",
                 "noise_mode", "output_mode", "bypass"):
        assert name in port_fields


def test_layout_is_contiguous_and_ends_with_latency() -> None:
    ports = ttl.control_ports()
    for _, n, _ in ttl.PLUGINS:
        index = ttl.port_indices(n, ports)
        # LV2 core: port indices run from 0 to (number of ports - 1) without gaps.
        assert sorted(index.values()) == list(range(2 * n + len(ports) + 1))
        assert index["latency"] == 2 * n + len(ports)


def test_enumerations_offer_only_usable_choices() -> None:
    estimator = next(p for p in ttl.control_ports() if p.field == "estimator")
    offered = {estimator.choices[i] for i in estimator.offered}
    # lifted-nulls needs null bearings, which have no port: Settings refuses it without them.
    with pytest.raises(ValueError):
        Settings(estimator="lifted-nulls", mic_spacing_m=0.1)
    assert "lifted-nulls" not in offered
    assert offered == set(estimator.choices) - {"lifted-nulls"}
    assert estimator.default == estimator.choices.index(Settings().estimator)


def test_comments_give_unit_range_and_unset_value() -> None:
    for port in ttl.control_ports():
        comment = ttl.port_comment(port)
        if port.unit:
            assert ttl.UNIT_WORDS[port.unit] in comment
        if port.zero:
            assert "0 means " in comment and port.minimum <= 0.0 <= port.maximum
        assert port.minimum <= port.default <= port.maximum


def test_turtle_literals_escape_quotes_and_backslashes() -> None:
    assert ttl._literal('say "hi" \\ now') == '"say \\"hi\\" \\\\ now"'
    assert ttl._literal("two\nlines").startswith('"""')
    assert ttl._number(0.005) == "0.005"
    assert ttl._number(18.0) == "18"


def test_defaults_map_to_default_settings() -> None:
    controls = _controls()
    values = [p["default"] for p in controls]
    settings, problems = bridge.settings_from_controls(values, controls)
    assert settings == Settings() and problems == []
    unconnected = [math.nan] * len(controls)
    assert bridge.settings_from_controls(unconnected, controls) == (Settings(), [])


def _values(**by_symbol: float) -> tuple[list[float], list[dict]]:
    controls = _controls()
    return [by_symbol.get(p["symbol"], p["default"]) for p in controls], controls


def test_port_values_map_to_settings() -> None:
    values, controls = _values(estimator=9, reduction_limit_db=12.0, target_deg=60.0,
                               mic_spacing_m=0.08, noise_mode=2, output_mode=1, bypass=1.0)
    settings, problems = bridge.settings_from_controls(values, controls)
    assert problems == []
    assert settings == Settings(estimator="passthrough", reduction_limit_db=12.0,
                                target_deg=60.0, mic_spacing_m=0.08, noise_mode="hold",
                                output_mode="keep-image", bypass=True)


def test_out_of_range_values_are_clamped_or_unset() -> None:
    values, controls = _values(reduction_limit_db=99.0, mic_spacing_m=0.001)
    settings, _ = bridge.settings_from_controls(values, controls)
    assert settings.reduction_limit_db == 40.0
    assert settings.mic_spacing_m is None  # 0.001 m lies nearer "not set" (0) than 0.005 m
    values, controls = _values(mic_spacing_m=0.004)
    assert bridge.settings_from_controls(values, controls)[0].mic_spacing_m == 0.005


def test_refused_combinations_fall_back_and_say_so() -> None:
    # A bearing without a spacing is refused by Settings; the plugin drops the bearing only.
    values, controls = _values(target_deg=45.0, reduction_limit_db=6.0, estimator=7,
                               output_mode=1)
    settings, notes = bridge.settings_from_controls(values, controls)
    assert settings == Settings(reduction_limit_db=6.0, estimator="mvdr",
                                output_mode="keep-image")
    assert notes == ["target_deg ignored (a talker bearing needs the microphone spacing "
                     "as well)"]
    values, controls = _values(estimator=4)  # lifted-nulls: not offered
    settings, problems = bridge.settings_from_controls(values, controls)
    assert settings.estimator == Settings().estimator and problems


def test_every_control_at_zero_gives_the_default_settings() -> None:
    # Some hosts (ecasound) start every control port at 0 when given no values.
    controls = _controls()
    settings, notes = bridge.settings_from_controls([0.0] * len(controls), controls)
    assert settings == Settings()
    # Only the value read as something else than itself is reported; "not set" is a 0 that
    # means what it says.
    assert notes == [
        f"reduction_limit_db 0 read as the default {DEFAULT_LIMIT} (0 means the default)"]


def test_zero_stands_for_the_default_only_where_zero_is_useless() -> None:
    by_field = {p.field: p for p in ttl.control_ports()}
    # A 0 dB reduction limit removes nothing, and a bearing needs a spacing: both stand for
    # the default. The choices' first entries are the defaults already, and bypass 0 is off.
    assert by_field["reduction_limit_db"].zero == "default"
    assert by_field["target_deg"].zero == by_field["mic_spacing_m"].zero == "unset"
    for port in ttl.control_ports():
        if port.kind in ("enumeration", "toggle"):
            assert port.zero == "" and port.default == 0.0
    text = ttl.plugin_ttl(support.URI_2CH, 2, "dialogue-2ch")
    assert f'lv2:scalePoint [ rdfs:label "default ({DEFAULT_LIMIT} dB)" ; rdf:value 0 ]' in text
    assert text.count('lv2:scalePoint [ rdfs:label "not set" ; rdf:value 0 ]') == 2


def test_a_bearing_with_a_spacing_is_kept_and_odd_values_are_noted() -> None:
    values, controls = _values(target_deg=30.0, mic_spacing_m=0.1)
    assert bridge.settings_from_controls(values, controls) == (
        Settings(target_deg=30.0, mic_spacing_m=0.1), [])
    values, controls = _values(reduction_limit_db=-3.0, mic_spacing_m=5.0)
    settings, notes = bridge.settings_from_controls(values, controls)
    assert settings == Settings(mic_spacing_m=2.0)
    assert notes == [f"reduction_limit_db -3 read as the default {DEFAULT_LIMIT}",
                     "mic_spacing_m 5 clamped to 2"]


def test_plugin_info_finds_the_bridges_log_lines() -> None:
    from liftmag.commands import plugin

    assert plugin.CONTROLS_NOTE == bridge.CONTROLS_NOTE


def test_port_groups_follow_the_channel_count() -> None:
    # LV2 port groups: a stereo group has left and right; ours for 4 microphones is a
    # discrete group whose channels keep the array order.
    assert ttl.channel_designations(2) == ("pg:left", "pg:right")
    four = ttl.channel_designations(4)
    assert len(set(four)) == 4 and all("microphone-" in d for d in four)
    text = ttl.plugin_ttl(support.URI_4CH, 4, "dialogue-4ch")
    assert text.count(f"pg:group <{support.URI_4CH}#in>") == 4
    assert text.count(f"pg:group <{support.URI_4CH}#out>") == 4
    assert f"pg:mainInput <{support.URI_4CH}#in>" in text


def test_wrong_number_of_values_is_an_error() -> None:
    controls = _controls()
    with pytest.raises(ValueError, match="rebuild"):
        bridge.settings_from_controls([0.0], controls)


def test_build_digest_follows_the_baked_interpreter() -> None:
    builder = support.build_module()
    assert builder.source_digest("/a/bin/python") != builder.source_digest("/b/bin/python")
    assert builder.source_digest("/a/bin/python") == builder.source_digest("/a/bin/python")
