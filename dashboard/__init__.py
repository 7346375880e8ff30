"""Layout helpers for the Streamlit dashboard (``app.py`` and ``pages/``).

``state`` keeps the loaded dataset and the user's choices between reruns and
wraps the library's calls in small cached functions; ``charts`` builds the
Plotly figures; ``words`` holds the plain-language sentences. The forecasting
itself lives in the ``forecasting`` package, which never imports streamlit.
"""
