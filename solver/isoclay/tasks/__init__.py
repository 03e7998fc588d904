"""Edit tasks (deform, smooth, sharpen, remesh): a config dataclass and run() each."""
