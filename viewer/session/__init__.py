"""session layer of Headlight: the application model without Qt (see DEVELOPERS.md).

The one selection state and its events, what the window shows about a text, the jobs the
window hands to its worker thread, the controller that decides which jobs a user action
starts and where their results go, pane exports as plain builders, and the session file.
Everything here is testable without a display; ``viewer.gui`` wraps it in Qt widgets.
"""
