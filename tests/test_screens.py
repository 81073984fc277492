"""Observer screens follow the protocol: reference direction, answer keys, lab texts, one way to name keys."""

from __future__ import annotations

import re

import pytest

from fitting.errors import InputError
from runner.protocol import KeySettings, Protocol, ScreenSettings, StreamSettings
from runner.safety import caution_text
from runner.screens import clock_words, direction_words, key_words, screen_texts


def _all_texts(protocol: Protocol) -> dict[str, str]:
    return screen_texts(protocol, caution_text(protocol))


@pytest.mark.parametrize("reference, words, cw_side, ccw_side", [
    # A clockwise turn (as the observer sees it) of upward motion leans it to the right, of downward motion to
    # the left, of rightward motion downward, of leftward motion upward (common practice, no source).
    (90.0, "straight up", "to the right", "to the left"),
    (270.0, "straight down", "to the left", "to the right"),
    (0.0, "straight to the right", "downward", "upward"),
    (180.0, "straight to the left", "upward", "downward"),
])
def test_instructions_describe_the_protocols_reference(reference, words, cw_side, ccw_side):
    text = _all_texts(Protocol(reference_deg=reference))["instructions"]
    assert f"almost {words}." in text
    assert f"Tilted {cw_side}: press the right arrow key." in text
    assert f"Tilted {ccw_side}: press the left arrow key." in text
    if reference != 90.0:
        assert "straight up" not in text


def test_an_oblique_reference_is_a_clock_position():
    # 90 deg (up) is 12 o'clock and every 30 deg clockwise is one hour (common practice, no source)
    assert clock_words(90.0) == "12 o'clock" and clock_words(0.0) == "3 o'clock"
    assert clock_words(45.0) == "1:30" and clock_words(135.0) == "10:30" and clock_words(100.0) == "11:40"
    assert direction_words(45.0) == ("towards 1:30 on a clock face", "clockwise", "counter-clockwise")


def test_the_answer_keys_of_the_protocol_are_named():
    protocol = Protocol(keys=KeySettings(cw="m", ccw="z", proceed="return"))
    text = _all_texts(protocol)["instructions"]
    assert "press the M key" in text and "press the Z key" in text and "Press the Enter key to begin" in text


def test_every_screen_names_keys_the_same_way():
    for protocol in (Protocol(), Protocol(keys=KeySettings(quit="q", pause="space", proceed="return"))):
        texts = _all_texts(protocol)
        keys = protocol.keys
        for name, text in texts.items():
            assert "{" not in text.replace("{done}", "").replace("{total}", ""), name
            for key in (keys.cw, keys.ccw, keys.proceed, keys.quit, keys.pause):
                # a key named any other way than key_words() does: "press right", "the escape key", "Esc"
                bare = re.search(rf"(press|with) {re.escape(key)}\b", text, re.I)
                assert bare is None, f"{name}: {bare.group(0)!r}"
        assert "the Esc key" in texts["caution"] or keys.quit != "escape"
        assert key_words(keys.quit) in texts["paused"] and key_words(keys.proceed) in texts["break"]


def test_stream_instructions_say_which_motion_is_judged():
    protocol = Protocol(stream=StreamSettings(nback_periods=3), design={"tracks_per_condition": 2,
                                                                        "trials_per_track": 6})
    text = _all_texts(protocol)["instructions"]
    assert "Every fourth motion moves almost straight up." in text


def test_a_lab_instructions_file_replaces_the_bundled_text(tmp_path):
    (tmp_path / "texts").mkdir()
    (tmp_path / "texts" / "ours.txt").write_text("Judge motion {reference}: {cw_side} = {cw_key}.\n")
    protocol = Protocol(reference_deg=270.0, screens=ScreenSettings(instructions_file="texts/ours.txt"))
    texts = screen_texts(protocol, "", tmp_path / "protocol.toml")
    assert texts["instructions"] == "Judge motion straight down: to the left = the right arrow key."
    (tmp_path / "typo.txt").write_text("press {cw_kye}\n")
    with pytest.raises(InputError, match=r"unknown placeholder \{cw_kye\}") as caught:
        screen_texts(Protocol(screens=ScreenSettings(instructions_file="typo.txt")), "", tmp_path / "p.toml")
    assert caught.value.field == "screens.instructions_file"
    with pytest.raises(InputError, match="does not exist"):
        screen_texts(Protocol(screens=ScreenSettings(instructions_file="gone.txt")), "", tmp_path / "p.toml")
