"""Pictures of an instrument for ``inspect --plot``: the network, each field's complex, its lowest modes.

``modes`` and ``layout`` compute what is drawn (NumPy and SciPy only);
``draw`` draws it with matplotlib (the optional ``plot`` extra, imported
only when a picture is drawn) and writes the file atomically.
"""

__all__: list[str] = []
