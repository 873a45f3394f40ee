"""gui layer of Headlight (see DEVELOPERS.md): Qt widgets around ``viewer.session``.

The only package that imports Qt: the window, its worker and render threads, the panes and
the Qt half of exporting.
"""
