"""Prior construction: definitions, discounting, effective sample size, built priors."""
