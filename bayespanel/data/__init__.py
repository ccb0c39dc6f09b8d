"""The data layer: panels, columns, formulas, files, designs, data sources (Dask), the
demo data set and the result shape every fit answers with."""
