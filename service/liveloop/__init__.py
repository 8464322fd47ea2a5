"""The live loop: the candidate scored in the shadow of live traffic, and drift signals of live texts."""
