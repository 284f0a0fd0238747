-- index_returns as given: the asset-class benchmark return of each period; its period_end
-- dates define the calendar. Rename and cast only.
with source as (
    select * from index_returns
),

renamed as (
    select
        cast(period_end as date) as period_end,
        cast(asset_class as varchar) as asset_class,
        cast("return" as double) as index_return
    from source
)

select * from renamed
