"""The numeric core: arrays in, frozen results out; no files, no terminal, no plotting."""
