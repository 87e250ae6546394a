"""The caution printed with every proposal (no numerics: the operator's commands read it)."""

CAUTION = ("Proposals are suggestions. Check the dose budget of a beam-sensitive specimen "
           "before accepting; facility procedures and the instrument's interlocks come first.")
