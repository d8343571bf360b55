"""One survey: read the clouds, place them in the site CRS, clean and classify them through a
pipeline, grid the surface and fill its holes."""

from inventory.survey.measure import SurveyResult, measure_survey, measure_surveys

__all__ = ["SurveyResult", "measure_survey", "measure_surveys"]
