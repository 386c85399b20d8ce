"""A programme of cases: run them in this process or spread over a Dask cluster, with an
overview (:func:`errbudget.batch.driver.run_cases`). Dask is imported only when a cluster is
asked for (``errbudget run --cluster``, or a client given to ``run_cases``)."""
