"""The invented Larkspur Parcel Co. depot: scenes, incidents and camera conditions for the
demo and the benches."""
