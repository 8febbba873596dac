"""The HTML audit report, its view model, number formatting, SVG plots and the bundle."""
