"""The dashboard's pages, one module each; Dash loads them when ``create_app`` runs.

Never import these modules directly: ``dash.register_page`` needs an app to exist first.
"""
