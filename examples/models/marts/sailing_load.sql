-- Seats booked against capacity, per sailing (a correlated scalar subquery).
CREATE VIEW sailing_load AS
SELECT
    s.sailing_id,
    s.route,
    s.capacity,
    (SELECT coalesce(sum(b.seats), 0) FROM stg_bookings AS b WHERE b.sailing_ref = s.sailing_id) AS seats_booked
FROM stg_sailings AS s;
