"""The four roles of a DC-bias bench and the shipped generic profile that plays each."""

ROLES = ("meter", "supply", "scanner", "thermometer")

DEFAULT_PROFILES = {
    "meter": "generic-lcr",
    "supply": "generic-dc-supply",
    "scanner": "generic-scanner",
    "thermometer": "generic-thermometer",
}
