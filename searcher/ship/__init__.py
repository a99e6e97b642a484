"""What ships: the chosen candidate retrained, tested on held-out data, written with its card."""
