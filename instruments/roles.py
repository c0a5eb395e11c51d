"""The roles of a DC-bias bench and the shipped generic profile that plays each.

ROLES are the four every bench has; a temperature chamber is optional (a bench without one
measures at the room's temperature), so it is listed apart in OPTIONAL_ROLES.
"""

ROLES = ("meter", "supply", "scanner", "thermometer")
OPTIONAL_ROLES = ("chamber",)
ALL_ROLES = ROLES + OPTIONAL_ROLES

DEFAULT_PROFILES = {
    "meter": "generic-lcr",
    "supply": "generic-dc-supply",
    "scanner": "generic-scanner",
    "thermometer": "generic-thermometer",
    "chamber": "generic-chamber",
}
