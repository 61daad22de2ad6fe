"""The notebook workbench: thin ipywidgets/bqplot/anywidget views over a Study."""
