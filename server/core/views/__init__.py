"""What one image does inside the model: forward hooks (probe), top-k, per-channel activations,
conv kernels, and the rendering of maps and figures to pictures."""
