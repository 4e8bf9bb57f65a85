-- Revenue per route and day of booking.
CREATE TABLE daily_revenue AS
WITH priced AS (
    SELECT b.sailing_ref, CAST(b.booked_at AS DATE) AS booking_day, b.fare * b.seats AS amount, b.seats
    FROM stg_bookings AS b
)
SELECT
    s.route,
    p.booking_day,
    sum(p.amount) AS total_fare,
    sum(p.seats) AS seats_sold
FROM priced AS p
JOIN stg_sailings AS s ON s.sailing_id = p.sailing_ref
GROUP BY s.route, p.booking_day;
