"""Pin maps: the built-in ones against amaranth-boards' own definitions, and every check
that refuses a bad map with a message naming the pin."""

from __future__ import annotations

from pathlib import Path

import pytest
from amaranth.build import Pins

from dvgate.boards import (
    STATUS,
    board_for_config,
    builtin_boards,
    clock_plan,
    heartbeat_bit,
    load_pin_map,
    prepare_top,
)
from dvgate.config import parse_config
from dvgate.errors import UserError

BOARDS = ("icebreaker", "ice40-hx8k-breakout", "ulx3s")


def small_config(channels: int = 1, clock: str = "12 MHz", board: dict | None = None, source: str = "<test>"):
    """A small emulator config, as a test would write it."""
    raw = {
        "clock": clock,
        "channels": channels,
        "strobe": {"min_width": "2 cycles", "absence_timeout": "1 ms", "period": "100 us"},
        "pulses": {"rest": 1, "width": "2 cycles", "gap": "2 cycles"},
        "rate": {"frac_bits": 16, "clamp": 8, "backlog": 32, "owed_bits": 8},
    }
    if board is not None:
        raw["board"] = board
    return parse_config(raw, source)


def write_map(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


ICEBREAKER = 'platform = "amaranth_boards.icebreaker:ICEBreakerPlatform"\n'


def test_builtin_boards_are_the_three_of_the_issue() -> None:
    assert set(builtin_boards()) == set(BOARDS)


@pytest.mark.parametrize("board", BOARDS)
def test_builtin_pins_resolve_as_amaranth_boards_says(board: str) -> None:
    # Outside check: amaranth-boards' own connector definitions, resolved by Amaranth's
    # own resolver (Pins.map_names), give the same package pin as our map for every pin.
    pin_map = load_pin_map(board=board)
    platform = pin_map.platform()
    for pin in pin_map.pins():
        if ":" in pin.ref:
            assert Pins(pin.ref, dir="io").map_names(platform._conn_pins, None) == [pin.site], pin.role
    sites = [pin.site for pin in pin_map.pins()]
    assert len(sites) == len(set(sites)), "a package pin is used twice"


@pytest.mark.parametrize("board, channels", [("icebreaker", 11), ("ice40-hx8k-breakout", 16), ("ulx3s", 16)])
def test_builtin_channel_counts(board: str, channels: int) -> None:
    assert len(load_pin_map(board=board).channels) == channels


def test_icebreaker_board_resources_match_amaranth_boards() -> None:
    # Outside check: amaranth-boards' ICEBreakerPlatform puts the green LED on pin 37, the red
    # on pin 11 and the UART on rx 6 / tx 9.
    pin_map = load_pin_map(board="icebreaker")
    assert pin_map.leds["armed"].site == "37" and pin_map.leds["armed"].invert
    assert pin_map.leds["alarm"].site == "11"
    assert pin_map.uart is not None
    assert (pin_map.uart[0].site, pin_map.uart[1].site) == ("6", "9")
    assert pin_map.pll_input == "pad"


def test_ulx3s_arm_input_pulled_down() -> None:
    pin_map = load_pin_map(board="ulx3s")
    assert pin_map.arm.attrs["PULLMODE"] == "DOWN"
    assert pin_map.family == "ecp5"


def _icebreaker_map(tmp_path: Path, **changes: str) -> Path:
    lines = {
        "strobe": '"pmod_0:1"',
        "arm": '"pmod_0:7"',
        "channels": '[{ pos = "pmod_0:2", neg = "pmod_0:8" }, { pos = "pmod_0:3", neg = "pmod_0:9" }]',
    }
    lines.update(changes)
    body = ICEBREAKER + "".join(f"{key} = {value}\n" for key, value in lines.items())
    return write_map(tmp_path / "mine.toml", body)


def test_user_map_loads(tmp_path: Path) -> None:
    pin_map = load_pin_map(_icebreaker_map(tmp_path))
    assert [pin.site for pin in pin_map.channels[1]] == ["47", "46"]
    assert pin_map.name == "mine"


def test_pin_not_on_the_connector(tmp_path: Path) -> None:
    # PMOD pin 5 is ground on the iCEBreaker's PMOD1A: not a signal pin.
    path = _icebreaker_map(tmp_path, arm='"pmod_0:5"')
    with pytest.raises(UserError) as info:
        load_pin_map(path)
    text = str(info.value)
    assert "arm = 'pmod_0:5'" in text and "no such pin" in text
    assert "1, 2, 3, 4, 7, 8, 9, 10" in text


def test_unknown_connector(tmp_path: Path) -> None:
    path = _icebreaker_map(tmp_path, strobe='"pmod_7:1"')
    with pytest.raises(UserError, match=r"strobe = 'pmod_7:1': the board has no connector 'pmod_7'; "
                                        r"connectors: pmod_0, pmod_1, pmod_2"):
        load_pin_map(path)


def test_same_pin_twice(tmp_path: Path) -> None:
    path = _icebreaker_map(tmp_path, arm='"pmod_0:2"')
    with pytest.raises(UserError) as info:
        load_pin_map(path)
    assert str(info.value).endswith("channels[0].pos = 'pmod_0:2': package pin 2 is already used by arm = 'pmod_0:2'")


def test_same_package_pin_through_two_names(tmp_path: Path) -> None:
    # On the HX8K breakout, header J1 pin 34 is package pin C3, which is also LED D2 (led[0]).
    path = write_map(tmp_path / "hx.toml", 'strobe = "j_3:3"\narm = "j_3:4"\n'
                     'channels = [{ pos = "j_1:34", neg = "j_1:33" }]\n[leds]\narmed = "led[0]"\n')
    with pytest.raises(UserError) as info:
        load_pin_map(path, board="ice40-hx8k-breakout")
    assert "leds.armed = 'led[0]': package pin C3 is already used by channels[0].pos = 'j_1:34'" in str(info.value)


def test_the_clock_pin_is_taken(tmp_path: Path) -> None:
    # Header J4 pin 22 is package pin J3: the HX8K breakout's 12 MHz oscillator.
    path = write_map(tmp_path / "hx.toml", 'strobe = "j_4:22"\narm = "j_3:4"\n'
                     'channels = [{ pos = "j_3:5", neg = "j_3:6" }]\n')
    with pytest.raises(UserError, match=r"strobe = 'j_4:22': package pin J3 is already used by "
                                        r"the board's clock input 'clk12'"):
        load_pin_map(path, board="ice40-hx8k-breakout")


def test_too_few_pins_names_the_first_channel_without(tmp_path: Path) -> None:
    pin_map = load_pin_map(_icebreaker_map(tmp_path))
    cfg = small_config(channels=3)
    with pytest.raises(UserError) as info:
        pin_map.check_channels(cfg.hw.names)
    text = str(info.value)
    assert "the config has 3 channels but the pin map gives pins for 2" in text
    assert "channel 'z' (channels[2].pos and channels[2].neg) has no pins" in text


def test_builtin_too_few_pins_for_sixteen_channels() -> None:
    with pytest.raises(UserError, match=r"channel 'ch11' \(channels\[11\]"):
        board_for_config(small_config(channels=16), board="icebreaker")


def test_resource_written_as_connector_gets_a_hint(tmp_path: Path) -> None:
    path = _icebreaker_map(tmp_path)
    path.write_text(path.read_text() + '[leds]\narmed = "led_g:0"\n')
    with pytest.raises(UserError) as info:
        load_pin_map(path)
    text = str(info.value)
    assert "leds.armed = 'led_g:0'" in text and "write 'led_g[0]'" in text


def test_unknown_resource(tmp_path: Path) -> None:
    path = _icebreaker_map(tmp_path)
    path.write_text(path.read_text() + '[leds]\narmed = "led_b[0]"\n')
    with pytest.raises(UserError, match=r"leds.armed = 'led_b\[0\]': the board has no resource led_b\[0\]"):
        load_pin_map(path)


def test_unknown_status(tmp_path: Path) -> None:
    path = _icebreaker_map(tmp_path)
    path.write_text(path.read_text() + '[leds]\nblinky = "led_g[0]"\n')
    with pytest.raises(UserError) as info:
        load_pin_map(path)
    text = str(info.value)
    assert "blinky" in text and ", ".join(STATUS) in text


def test_unknown_key_suggests(tmp_path: Path) -> None:
    path = _icebreaker_map(tmp_path, strobe_pin='"pmod_0:4"')
    with pytest.raises(UserError, match="unknown key 'strobe_pin'; did you mean 'strobe'"):
        load_pin_map(path)


def test_user_map_needs_a_platform(tmp_path: Path) -> None:
    path = write_map(tmp_path / "bare.toml", 'strobe = "pmod_0:1"\narm = "pmod_0:7"\n'
                     'channels = [{ pos = "pmod_0:2", neg = "pmod_0:8" }]\n')
    with pytest.raises(UserError, match="platform: missing"):
        load_pin_map(path)
    # With --board the map takes that board's platform.
    assert load_pin_map(path, board="icebreaker").platform_cls.__name__ == "ICEBreakerPlatform"


def test_user_map_platform_must_match_board(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="differs from board 'ulx3s'"):
        load_pin_map(_icebreaker_map(tmp_path), board="ulx3s")


def test_platform_that_does_not_import(tmp_path: Path) -> None:
    path = _icebreaker_map(tmp_path)
    path.write_text(path.read_text().replace("icebreaker:ICEBreakerPlatform", "nowhere:NoPlatform"))
    with pytest.raises(UserError, match=r"platform = 'amaranth_boards.nowhere:NoPlatform': cannot import"):
        load_pin_map(path)


def test_family_dvgate_does_not_build_for(tmp_path: Path) -> None:
    path = write_map(tmp_path / "arty.toml", 'platform = "amaranth_boards.arty_a7:ArtyA7_35Platform"\n'
                     'strobe = "pmod_0:1"\narm = "pmod_0:2"\nchannels = [{ pos = "pmod_0:3", neg = "pmod_0:4" }]\n')
    with pytest.raises(UserError, match="iCE40 and ECP5 boards only"):
        load_pin_map(path)


def test_unknown_board() -> None:
    with pytest.raises(UserError, match=r"--board = 'nope': allowed: ice40-hx8k-breakout, icebreaker, ulx3s"):
        load_pin_map(board="nope")


def test_no_board_at_all() -> None:
    with pytest.raises(UserError, match="no board: give --board"):
        board_for_config(small_config())


def test_board_section_name_and_relative_pins(tmp_path: Path) -> None:
    assert board_for_config(small_config(board={"name": "ulx3s"})).name == "ulx3s"
    _icebreaker_map(tmp_path)
    cfg = small_config(board={"pins": "mine.toml"}, source=str(tmp_path / "emu.toml"))
    assert board_for_config(cfg).name == "mine"
    # The command line wins over the section.
    assert board_for_config(cfg, board="ulx3s").name == "ulx3s"


def test_board_section_unknown_key() -> None:
    with pytest.raises(UserError, match=r"unknown key 'board.nmae'; did you mean 'board.name'"):
        board_for_config(small_config(board={"nmae": "ulx3s"}))


def test_clock_plan_none_at_the_oscillator_and_exact_otherwise() -> None:
    icebreaker = load_pin_map(board="icebreaker")
    assert clock_plan(icebreaker, 12e6) is None
    plan = clock_plan(icebreaker, 48e6)
    assert plan is not None and plan.family == "ice40" and plan.output_hz == 48_000_000
    with pytest.raises(UserError, match=r"<cfg>: clock = '12 MHz': board 'ulx3s' .* nearest: 12.5 MHz"):
        clock_plan(load_pin_map(board="ulx3s"), 12e6, "<cfg>")


def test_heartbeat_about_four_toggles_a_second() -> None:
    # 1 kHz strobes at 12 MHz: 250 strobes per quarter second, nearest power of two 256.
    assert heartbeat_bit(12_000, 12e6) == 8
    assert heartbeat_bit(12_000_000, 12e6) == 0


def test_board_top_refuses_too_many_channels(tmp_path: Path) -> None:
    pin_map = load_pin_map(_icebreaker_map(tmp_path))
    with pytest.raises(UserError, match="too few pins"):
        prepare_top(small_config(channels=3), pin_map, None)


def test_board_top_adds_one_resource_per_role(tmp_path: Path) -> None:
    pin_map = load_pin_map(board="icebreaker")
    top, platform = prepare_top(small_config(channels=2), pin_map, None)
    names = {(res.name, res.number) for res in top.resources()}
    assert names == {("dvgate_strobe", 0), ("dvgate_arm", 0), ("ch_x", 0), ("ch_y", 0),
                     ("dvgate_led_armed", 0), ("dvgate_led_alarm", 0)}
    assert all(key in platform.resources for key in names)
    platform.prepare(top)  # elaborates: every requested pin exists
