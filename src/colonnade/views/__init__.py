"""The views layer: the graph, diagrams, plots and reports. They read; they never write."""
