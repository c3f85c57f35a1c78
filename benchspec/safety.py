"""Safety cautions for each kind of light source.

These are reminders, not a risk assessment: the school's or lab's safety
rules, local regulations and the safety officer always take precedence.
"""

from __future__ import annotations

from .errors import InputError

__all__ = ["SOURCE_TYPES", "cautions_for", "GENERAL_CAUTION", "format_cautions"]

GENERAL_CAUTION = (
    "These cautions are reminders, not a risk assessment: follow your school's or lab's "
    "safety rules and local regulations, and ask your safety officer when in doubt."
)

# source type -> (title, cautions)
_CAUTIONS: dict[str, tuple[str, tuple[str, ...]]] = {
    "fluorescent": (
        "Fluorescent lamp (CFL) or mercury lamp",
        (
            "Mercury lamps emit ultraviolet light; a bare quartz mercury lamp emits 253.7 nm UV: never look at it directly.",
            "A broken CFL releases mercury: clear and air the room, do not use a vacuum cleaner, "
            "seal the debris in a closed container and follow local disposal rules.",
            "Do not operate a lamp whose glass is cracked.",
        ),
    ),
    "discharge": (
        "Gas-discharge tube",
        (
            "Tube power supplies run at several kilovolts: never touch the tube or its holder while powered.",
            "Switch off and unplug the supply before changing tubes.",
            "Tubes get hot in use: let them cool before handling.",
            "Mercury tubes emit UV; do not look at any tube at close range for long.",
        ),
    ),
    "laser": (
        "Laser",
        (
            "Never aim a laser at anyone's eyes, or at shiny surfaces that can reflect the beam.",
            "Class 2 (<1 mW) relies on the blink reflex; class 3R/3B pointers are common and often mislabelled. "
            "Laser classes: IEC 60825-1.",
            "Green pointers can leak invisible infrared light.",
            "Point the laser at a matte card and record the spot, never the beam itself.",
        ),
    ),
    "led": (
        "LED or UV LED",
        (
            "Do not stare into bright LEDs at close range (photobiological safety of lamps: IEC 62471).",
            "UV LEDs need shielding and UV-blocking eyewear; the light may be invisible or look dim.",
        ),
    ),
    "halogen": (
        "Halogen or incandescent lamp",
        (
            "Halogen lamps run at several hundred degrees Celsius: do not touch the bulb or housing; let it cool.",
            "Keep paper, cloth and plastics away from the lamp; never touch a halogen bulb with bare fingers.",
            "Bare quartz halogen bulbs can emit some UV.",
        ),
    ),
    "daylight": (
        "Daylight and the Sun",
        (
            "Never look at the Sun, or point a camera, grating or any optics at it.",
            "Use sunlight scattered from a white card or the sky, away from the Sun.",
        ),
    ),
    "other": (
        "Other source",
        ("Check the source's own documentation and your lab's rules before use.",),
    ),
}

SOURCE_TYPES: tuple[str, ...] = tuple(_CAUTIONS)


def cautions_for(source_type: str) -> tuple[str, tuple[str, ...]]:
    """Title and caution sentences for ``source_type`` (one of :data:`SOURCE_TYPES`)."""
    key = source_type.strip().lower()
    if key not in _CAUTIONS:
        raise InputError(f"unknown source type {source_type!r}; choose one of: {', '.join(SOURCE_TYPES)}")
    return _CAUTIONS[key]


def format_cautions(source_type: str | None = None) -> str:
    """Plain-text cautions for one source type, or for all of them."""
    keys = SOURCE_TYPES if source_type is None else (source_type,)
    blocks = []
    for key in keys:
        title, items = cautions_for(key)
        blocks.append(title + ":\n" + "\n".join(f"  - {item}" for item in items))
    return "\n".join(blocks) + "\n" + GENERAL_CAUTION
