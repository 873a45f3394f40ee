"""The panes of the window: each observes the shared selection and draws through a figure
builder of ``viewer.figures`` (or shows a table)."""
