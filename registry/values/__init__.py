"""Values at the bottom of the package: scales, measures, distribution families, priors.

Every other layer may import these modules; they import nothing of ours but
`registry.errors`.
"""
