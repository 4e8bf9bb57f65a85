-- Which route earned most each day (a window over another mart).
CREATE VIEW route_rankings AS
SELECT
    booking_day,
    route,
    total_fare,
    rank() OVER (PARTITION BY booking_day ORDER BY total_fare DESC) AS day_rank,
    total_fare / sum(total_fare) OVER (PARTITION BY booking_day) AS share_of_day
FROM daily_revenue
QUALIFY rank() OVER (PARTITION BY booking_day ORDER BY total_fare DESC) <= 3;
