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


def logged_above_rated(channel: str, samples: int, peak_bar: float, rated_bar: float) -> str:
    """One-line caution for logged rig values above the rated pressure (values in bar gauge);
    ``channel`` is ``"pressure"`` (what the muscles saw) or ``"command"`` (what was asked)."""
    if channel == "pressure":
        what, act = ("measured pressures", "the muscles saw more than they are rated for: check the regulator and the "
                     "relief valve (set below the rating), the muscles and their end fittings before the next trial")
    else:
        what, act = ("commands", "the profile run on the rig asked more than the muscles are rated for: lower it "
                     "before the next trial")
    return (f"CAUTION: the log's {what} exceed the rated pressure {rated_bar:g} bar gauge in {samples} sample(s) "
            f"(peak {peak_bar:.3g} bar); {act}. Follow ISO 4414, local codes and qualified practice.")
