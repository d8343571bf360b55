"""The site folder: load it, check every row once, and hand the layers above typed objects."""

from inventory.site.load import (
    CheckReport, Material, Movements, Scale, Site, SiteConfig, SurveyRef, check_site, load_site, parse_base,
)

__all__ = [
    "CheckReport", "Material", "Movements", "Scale", "Site", "SiteConfig", "SurveyRef",
    "check_site", "load_site", "parse_base",
]
