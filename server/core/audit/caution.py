"""The caution every audit result carries: a map is evidence, not proof; the reviewer's rules decide.

Kept in a module of its own so that readers of stored runs (the report, ``pellucid runs``) can
quote it without importing the compute side (torch and the attribution methods).
"""

CAUTION = (
    "Attribution maps are evidence about this model on these images, not proof of what it has learned or "
    "of how it will behave elsewhere; deployment decisions follow the domain's own rules, reviews and sign-off."
)
