"""Planning before a survey: declared sources read from a file, predicted exclusion zones drawn and exported."""
