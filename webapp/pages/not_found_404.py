"""Any other address."""

from dash import html, register_page

register_page(__name__, path="/404", title="recinet: not found")


def layout(**_query):
    return html.Div(className="page-message", children=[
        html.H1("Not found"), html.P("There is no page at this address."), html.A("Start an analysis", href="/")])
