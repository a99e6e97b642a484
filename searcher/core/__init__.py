"""The torch-free core: a space file, the architectures it holds, their exact cost, the budget gate
and the census. Nothing here imports torch, so reading a space or counting a million candidates
starts at once (``tests/test_space.py`` checks)."""
