"""The budget: the passes over the ensemble, the candidate-step search, the combination of
the components and the one builder of budget.json; ``run_case`` drives the pipeline.
"""
