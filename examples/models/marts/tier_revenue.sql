-- Loaded by INSERT with a column list: the names come from the list, by position.
CREATE TABLE tier_revenue (tier TEXT, passengers BIGINT, revenue DECIMAL(14,2));
INSERT INTO tier_revenue (tier, passengers, revenue)
SELECT p.tier, count(DISTINCT b.passenger_ref), sum(b.fare) FILTER (WHERE b.seats > 0)
FROM stg_bookings AS b
JOIN stg_passengers AS p ON p.passenger_id = b.passenger_ref
GROUP BY p.tier;
