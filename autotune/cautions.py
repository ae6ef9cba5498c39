"""The safety cautions shown before every powered run: one text for every screen and printer."""

from __future__ import annotations

CAUTION_ITEMS: tuple[str, ...] = (
    "the robot is on blocks: wheels and joints turn freely, it goes nowhere",
    "the area around it is clear of people, tools and loose cables",
    "hands, hair, loose clothing and cables are away from moving parts",
    "a physical power cut-off (emergency stop or supply switch) is within your reach",
    "the software stop keys (Space, Esc, q, Ctrl-C) are no substitute for that cut-off",
    "follow your local safety codes and licensed practice for machinery",
)

CAUTION_TITLE = "This run powers a motor. Before you go on, make sure that:"
