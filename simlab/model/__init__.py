"""The mathematics of belief: kernels, the stacked Gaussian-process posterior, fitting, optimisers."""
