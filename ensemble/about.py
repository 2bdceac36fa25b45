"""What the program is: its name, version, and the caution that travels with every
result, picture and table it makes."""

PROGRAM = "ensemble"

VERSION = "0.1.0"

CAUTION = (
    "Model projections inform, and never replace, the guidance of the public-health "
    "authority responsible for the population."
)
