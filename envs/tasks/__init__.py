"""The task families, one file each: its world, its kernels and its Gymnasium classes."""
