"""gui layer of Headlight (see DEVELOPERS.md for the layering).

The only package that imports Qt. Importing it first applies ``compat.protect_singletons``,
a guard against a reference-count bug of PySide6 6.12 on CPython 3.11.
"""

from viewer.gui.compat import protect_singletons

protect_singletons()
