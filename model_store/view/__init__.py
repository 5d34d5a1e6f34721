"""The view: model cards, pages and plots for auditors and operators.

    charts.py     Vega-Lite specifications of every plot
    card.py       the model card's content, from a verified bundle
    sources.py    a card from a version in the store, or from a bundle file
    timeline.py   which version was live when, from a model's history
    pages.py      the HTML shells of the served pages and the offline card file
    assets.py     the scripts and style sheet shipped in ``assets/`` (Vega files in ``assets/vendor``)

The service (``service/view_routes.py``) only routes to these; nothing here imports the service
or scikit-learn.
"""

__all__: list[str] = []
