"""Drawing a phantom under hostile input: bad settings are one InputError line, and any phantom
the language accepts (names with math signs or any script, sizes at the ends of their
ranges) is drawn."""

from __future__ import annotations

import pytest

from simbench import budget
from simbench.errors import InputError
from simbench.phantom import parse_phantom_text
from simbench.report.drawing import MAX_PIXELS, MIN_PIXELS, draw_phantom

PNG = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
CIRCLE = "name: t\ndimension: 2\nobjects:\n  - {shape: circle, radius: 1, mu: 1 /mm}\n"


@pytest.mark.parametrize("pixels", [MIN_PIXELS - 1, MAX_PIXELS + 1, 10**9, 2.5, True, "64"])
def test_pixels_out_of_range(tmp_path, pixels):
    with pytest.raises(InputError, match=r"pixels: must be a whole number from 8 to 4096"):
        draw_phantom(parse_phantom_text(CIRCLE), tmp_path / "p.png", pixels=pixels)
    assert not list(tmp_path.iterdir())


@pytest.mark.parametrize("energy", [0.0, -60.0, float("nan"), float("inf"), "sixty"])
def test_energy_that_is_not_a_positive_number(tmp_path, energy):
    with pytest.raises(InputError, match=r"energy_kev: must be a positive energy"):
        draw_phantom(parse_phantom_text(CIRCLE), tmp_path / "p.png", energy_kev=energy)


def test_names_with_math_signs_and_any_script_are_drawn_as_text(tmp_path):
    text = ("name: '$\\frac{$ bench'\ndimension: 2\nobjects:\n"
            "  - {shape: circle, radius: 1, mu: 1 /mm, name: 'a$\\undefined$ 試料 ☃'}\n")
    out = draw_phantom(parse_phantom_text(text), tmp_path / "p.png", pixels=32)
    assert out.read_bytes()[:8] == PNG


@pytest.mark.parametrize("objects", [
    # the largest and the smallest sizes at the farthest coordinates of the language
    "  - {shape: sphere, radius: 1.0e5, centre: [1.0e5, 1.0e5, -1.0e5], mu: 1 /mm}\n"
    "  - {shape: sphere, radius: 1.0e-5, centre: [-1.0e5, 0, 0], mu: 1 /mm, name: tiny}\n",
    "  - {shape: box, size: [1.0e-5, 1.0e5, 1.0e-5], mu: 1 /mm, rotate: [x: 45]}\n",
])
def test_extreme_sizes_are_drawn(tmp_path, objects):
    phantom = parse_phantom_text("name: t\ndimension: 3\nobjects:\n" + objects)
    assert draw_phantom(phantom, tmp_path / "p.png", pixels=32).read_bytes()[:8] == PNG


def test_drawing_over_the_budget_is_refused_before_rasterizing(tmp_path):
    phantom = parse_phantom_text(CIRCLE)
    budget.set_memory_budget(2**20)  # 1 MiB; 4096^2 pixels x 32 B = 512 MiB (arithmetic)
    try:
        with pytest.raises(InputError, match=r"pixels: drawing [\d,]+ pixels would need about"):
            draw_phantom(phantom, tmp_path / "p.png", pixels=MAX_PIXELS)
    finally:
        budget.set_memory_budget(None)
    assert not list(tmp_path.iterdir())
