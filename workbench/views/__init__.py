"""Views: static figures (matplotlib/cartopy, :mod:`workbench.views.static`) and interactive
views (Bokeh through Panel, :mod:`workbench.views.interactive`). Views read the State/Case and
draw; they compute no physics. Submodules are imported on first use."""
