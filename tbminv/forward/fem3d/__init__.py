"""pyGIMLi's 3D finite elements: tetgen meshes of the machine and tunnel, the 3D model."""
