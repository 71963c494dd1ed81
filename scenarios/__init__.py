"""The example scenarios (invented data, each file says so), installed with microsim as the
data package `microsim.examples` (see pyproject.toml) so that `microsim benchmark` finds its
demo wherever microsim is installed. Read them with importlib.resources."""
