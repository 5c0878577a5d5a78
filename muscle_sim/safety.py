"""Safety wording printed by commands and written into reports (one source for all outputs)."""

GENERAL = ("SAFETY: pressurized air stores energy. Stay within the muscle's rated pressure (regulator "
           "plus relief valve set below it), guard against burst and end-fitting pull-out, keep hands "
           "out of the joint's sweep, wear eye protection, and exhaust, verify zero pressure and lock "
           "out before maintenance. Follow ISO 4414, local codes and qualified practice.")


def over_rated(requested_bar: float, rated_bar: float) -> str:
    """One-line caution for a pressure above the rated pressure (values in bar gauge)."""
    return (f"CAUTION: {requested_bar:g} bar exceeds the rated pressure {rated_bar:g} bar gauge; "
            f"values above it are for analysis only, never command them on hardware.")

HARDWARE = ("Profiles made here are new commands for hardware: check the limits on the rig, start at "
            "reduced pressure, keep clear of the sweep, and keep an emergency exhaust within reach.")
