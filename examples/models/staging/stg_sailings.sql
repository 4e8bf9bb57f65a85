-- A bare SELECT: the model is named after the file (stg_sailings).
SELECT sailing_id, route, vessel, departs_at, capacity
FROM ferry.sailings
