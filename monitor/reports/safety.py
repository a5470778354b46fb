"""The safety caution, in one wording for the command line, the report and the board."""

from __future__ import annotations

SAFETY_TEXT = (
    "ebullio monitors; it is not a safety device. Hot water and steam scald. Heating "
    "elements run on mains voltage: isolate and lock off the supply before opening a vessel, "
    "a terminal box or a meter. An element run dry can burn out or start a fire. A closed "
    "storage heater or boiler is a pressure vessel and needs its own relief valve. Follow "
    "local codes and the maker's instructions, and leave installation and repair to "
    "licensed practitioners."
)
#: The caution as the command line prints it.
SAFETY_NOTE = "Caution: " + SAFETY_TEXT
