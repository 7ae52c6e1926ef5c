"""The demo shop and operator pages, served when CAIRN_PAGES is on (see routes.py)."""

from service.api.pages.routes import install_pages

__all__ = ["install_pages"]
