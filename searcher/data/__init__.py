"""Images in: the built-in demo, .npz files and class folders, decoded once and split reproducibly."""
