"""A study and a replicate number in; that replicate's material out: world, optimum, design, noise, pool."""
