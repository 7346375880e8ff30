"""Layout helpers for the Streamlit dashboard (``app.py`` and ``pages/``).

``state`` keeps the loaded dataset and the user's choices between reruns and wraps the
library's calls in small cached functions (each page's work is done once per dataset and
option set); ``layout`` holds what every page shows (the header, the dataset line, problems
worded with the page's own controls, named progress for slow steps, the pseudonym switch);
``charts`` and ``outlook_charts`` build the Vega-Lite charts (light at any number of customers); ``words`` holds the
plain-language sentences and the controls' names. The forecasting itself lives in the
``forecasting`` package, which never imports streamlit.
"""
