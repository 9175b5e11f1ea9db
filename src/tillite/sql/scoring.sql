-- A scoring macro generated from a tillite model file: the nearest segment id (0 .. k-1), or
-- the distance to the nearest centroid in the model's scaled units. Its arguments are the
-- model's columns, in the model's order; it gives NULL when any of them is NULL, NaN or infinite.
CREATE OR REPLACE MACRO {{macro}}({{params}}) AS
{{body}};
