"""One Streamlit page per file; each is listed once in :data:`ui.app.VIEWS`."""
