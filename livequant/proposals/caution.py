"""The caution printed with every proposal (no numerics: the operator's commands read it)."""

CAUTION = ("Proposals are suggestions. Dose limits are the operator's and the facility's to "
           "set: check the dose budget of a beam-sensitive specimen before accepting (the dose "
           "shown is an estimate from the nominal current and dwell); facility procedures and "
           "the instrument's interlocks come first.")
