"""The simulated laboratory of quietwell: a seeded physics model of a levitated
particle, its detector, feedback, trap laser and vacuum chamber, behind the same
device interfaces as real instruments."""

__all__: list[str] = []
